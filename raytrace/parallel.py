"""MPI for the slicing stage, with a serial stand-in when no MPI launcher started us.

mpi4py is imported only when the process was started by an MPI launcher (its
environment carries a rank count), so the serial path works without mpi4py installed
and without the start-up cost of MPI. ``RAYTRACE_MPI=0`` forces the serial path, and
``RAYTRACE_MPI=1`` forces MPI even where the launcher sets none of the variables below.

The few collective operations slicing needs are methods of :class:`Comm`; the serial
:class:`SerialComm` implements them as no-ops, so the slicing code has one path.
"""

from __future__ import annotations

import os
import time
from typing import Any, Callable, TypeVar

import numpy as np

from .errors import RaytraceError

T = TypeVar("T")

#: environment variables by which common launchers announce the number of ranks
#: (MPICH/Hydra and Intel MPI: PMI_SIZE; Open MPI: OMPI_COMM_WORLD_SIZE; PMIx: PMIX_RANK
#: with a size in one of the others; Slurm's srun: SLURM_NTASKS with SLURM_PROCID)
_LAUNCHER_SIZE_VARS = ("PMI_SIZE", "OMPI_COMM_WORLD_SIZE", "MPI_LOCALNRANKS", "PMIX_SIZE")


def launched_by_mpi(environ=os.environ) -> bool:
    """Whether the environment says this process is one of several MPI ranks."""
    forced = environ.get("RAYTRACE_MPI")
    if forced is not None:
        return forced.strip().lower() in ("1", "true", "yes")
    for var in _LAUNCHER_SIZE_VARS:
        try:
            if int(environ.get(var, "1")) > 1:
                return True
        except ValueError:
            continue
    if "SLURM_PROCID" in environ and environ.get("SLURM_STEP_NUM_TASKS", environ.get("SLURM_NTASKS", "1")) not in ("", "1"):
        return True
    return False


class SerialComm:
    """One rank: every collective is the identity."""

    rank = 0
    size = 1

    def sum_inplace(self, array: np.ndarray) -> None:
        pass

    def sum_to(self, array: np.ndarray, root: int) -> None:
        pass

    def sum_scalar(self, value: float) -> float:
        return value

    def bcast(self, value: T) -> T:
        return value

    def allgather(self, value: T) -> list[T]:
        return [value]

    def gather_arrays(
        self, arrays: dict[int, np.ndarray], out: np.ndarray | None, n: int, owner: Callable[[int], int]
    ) -> None:
        """Fill ``out[i]`` (i < n) on rank 0 with ``arrays[i]`` from rank ``owner(i)``; ``out`` is None elsewhere."""
        assert out is not None
        for i in range(n):
            out[i] = arrays[i]

    def wait_for_all(self, poll_s: float = 0.002) -> None:
        pass

    def agree(self, error: str | None) -> None:
        if error is not None:
            raise RaytraceError(error)

    def barrier(self) -> None:
        pass


class MPIComm(SerialComm):
    """The ranks of ``mpi4py.MPI.COMM_WORLD``."""

    def __init__(self, comm):
        from mpi4py import MPI

        self._mpi = MPI
        self.comm = comm
        self.rank = comm.Get_rank()
        self.size = comm.Get_size()

    def sum_inplace(self, array: np.ndarray) -> None:
        """Element-wise sum over the ranks, left on every rank."""
        self.comm.Allreduce(self._mpi.IN_PLACE, array, op=self._mpi.SUM)

    def sum_to(self, array: np.ndarray, root: int) -> None:
        """Element-wise sum over the ranks into ``array`` on ``root`` (other ranks' copies are left as they were)."""
        if self.rank == root:
            self.comm.Reduce(self._mpi.IN_PLACE, array, op=self._mpi.SUM, root=root)
        else:
            self.comm.Reduce(array, None, op=self._mpi.SUM, root=root)

    def sum_scalar(self, value: float) -> float:
        return float(self.comm.allreduce(float(value), op=self._mpi.SUM))

    def bcast(self, value: T) -> T:
        return self.comm.bcast(value, root=0)

    def allgather(self, value: T) -> list[T]:
        return self.comm.allgather(value)

    def gather_arrays(
        self, arrays: dict[int, np.ndarray], out: np.ndarray | None, n: int, owner: Callable[[int], int]
    ) -> None:
        if self.rank == 0:
            assert out is not None
            for i in range(n):
                if owner(i) == 0:
                    out[i] = arrays[i]
                else:  # received straight into the (contiguous) output row
                    self.comm.Recv(out[i], source=owner(i), tag=i)
        else:
            for i in sorted(arrays):
                self.comm.Send(np.ascontiguousarray(arrays[i]), dest=0, tag=i)

    def wait_for_all(self, poll_s: float = 0.002) -> None:
        """A barrier that sleeps while it waits (MPI's own waits spin and take a core from the busy ranks)."""
        request = self.comm.Ibarrier()
        while not request.Test():
            time.sleep(poll_s)

    def agree(self, error: str | None) -> None:
        """Every rank raises the first rank's error if any rank has one (no rank is left waiting)."""
        self.wait_for_all()  # ranks that finished early sleep until the last one arrives
        errors = self.comm.allgather(error)
        first = next((e for e in errors if e is not None), None)
        if first is not None:
            raise RaytraceError(first)

    def barrier(self) -> None:
        self.comm.Barrier()


def world() -> SerialComm:
    """The communicator of this process: MPI's world when launched by MPI, else a serial one."""
    if not launched_by_mpi():
        return SerialComm()
    try:
        from mpi4py import MPI
    except ImportError as exc:
        raise RaytraceError(
            f"started by an MPI launcher but mpi4py cannot be imported ({exc}); "
            "install it with pip install '.[mpi]' or run without mpiexec"
        ) from None
    return MPIComm(MPI.COMM_WORLD)


def collective(comm: SerialComm, fn: Callable[[], T]) -> T:
    """Run ``fn`` on every rank; if it raises a RaytraceError on any rank, raise it on all."""
    result: Any = None
    error, original = None, None
    try:
        result = fn()
    except RaytraceError as exc:
        error = str(exc)
    except Exception as exc:  # a bug on one rank must not leave the others waiting
        error, original = f"rank {comm.rank} failed: {type(exc).__name__}: {exc}", exc
    try:
        comm.agree(error)
    except RaytraceError:
        if original is not None:
            raise original
        raise
    return result
