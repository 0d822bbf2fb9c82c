"""Atomic HDF5 output and provenance attributes shared by every stage.

Every file a stage produces is written to ``<name>.tmp.<host>.<pid>`` first, flushed and
fsynced, then renamed over the final name. A killed job therefore leaves either nothing or
a ``.tmp`` file, never a file under the final name that looks complete but is not. The
temporary name is the writer's own, so two jobs writing the same file at once (a job left
running by a killed Snakemake, and its rerun) never write into one temporary file: each
rename puts a complete file in place. A writer removes the temporary files of the same name
left by processes of its host that are no longer running.
"""

from __future__ import annotations

import contextlib
import glob
import hashlib
import json
import os
import socket
from pathlib import Path
from typing import Any, Iterator, Mapping, Sequence

import h5py
import numpy as np

from . import __version__
from .errors import RaytraceError


def file_checksum(path: str | os.PathLike, *, max_bytes: int = 1 << 20) -> str:
    """SHA-256 of the first ``max_bytes`` of a file plus its size (cheap on large inputs)."""
    h = hashlib.sha256()
    p = Path(path)
    with open(p, "rb") as f:
        h.update(f.read(max_bytes))
    h.update(str(p.stat().st_size).encode())
    return h.hexdigest()[:16]


def _host() -> str:
    return socket.gethostname().split(".")[0].replace("/", "_") or "host"


def _running(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:  # another user's process
        return True
    return True


def remove_stale_temporaries(final: Path) -> list[Path]:
    """Remove ``final``'s temporary files left by dead processes of this host; return them."""
    removed = []
    host = _host()
    for tmp in final.parent.glob(glob.escape(final.name) + ".tmp*"):
        suffix = tmp.name[len(final.name):]
        if suffix == ".tmp":  # the single temporary name of earlier versions
            stale = True
        else:
            owner, _, pid = suffix[len(".tmp."):].rpartition(".")
            stale = owner == host and pid.isdigit() and not _running(int(pid))
        if stale:
            with contextlib.suppress(FileNotFoundError):
                tmp.unlink()
                removed.append(tmp)
    return removed


def temporary_path(final: Path) -> Path:
    """The temporary name this process writes ``final`` under."""
    return final.with_name(f"{final.name}.tmp.{_host()}.{os.getpid()}")


@contextlib.contextmanager
def atomic_file(path: str | os.PathLike) -> Iterator[Path]:
    """Yield a temporary path beside ``path``; rename it to ``path`` only on success."""
    final = Path(path)
    final.parent.mkdir(parents=True, exist_ok=True)
    remove_stale_temporaries(final)
    tmp = temporary_path(final)
    if tmp.exists():
        tmp.unlink()
    try:
        yield tmp
        with open(tmp, "rb+") as f:
            os.fsync(f.fileno())
        os.replace(tmp, final)
    except BaseException:
        if tmp.exists():
            tmp.unlink()
        raise


@contextlib.contextmanager
def atomic_h5(
    path: str | os.PathLike,
    *,
    stage: str,
    settings: Mapping[str, Any] | None = None,
    inputs: Sequence[str | os.PathLike] = (),
    seed: int | None = None,
) -> Iterator[h5py.File]:
    """Open an HDF5 file for writing atomically and stamp provenance on its root.

    Parameters
    ----------
    path : output file name.
    stage : name of the stage writing it (``slice``, ``trace`` ...).
    settings : the configuration section the stage used (stored as JSON).
    inputs : input files; names and checksums are recorded.
    seed : random seed used, if any.
    """
    with atomic_file(path) as tmp:
        with h5py.File(tmp, "w") as f:
            f.attrs["raytrace_version"] = __version__
            f.attrs["stage"] = stage
            f.attrs["settings_json"] = json.dumps(settings or {}, sort_keys=True, default=_json_default)
            f.attrs["inputs"] = json.dumps([str(p) for p in inputs])
            f.attrs["input_checksums"] = json.dumps([file_checksum(p) for p in inputs])
            if seed is not None:
                f.attrs["seed"] = int(seed)
            yield f


def _json_default(obj: Any) -> Any:
    if isinstance(obj, np.generic):
        return obj.item()
    if isinstance(obj, np.ndarray):
        return obj.tolist()
    raise TypeError(f"not JSON serialisable: {type(obj).__name__}")


def write_dataset(group: h5py.Group, name: str, data: np.ndarray, unit: str, **attrs: Any) -> h5py.Dataset:
    """Create a dataset with a ``unit`` attribute (``"1"`` for dimensionless)."""
    ds = group.create_dataset(name, data=data)
    ds.attrs["unit"] = unit
    for key, value in attrs.items():
        ds.attrs[key] = value
    return ds


def open_input(path: str | os.PathLike) -> h5py.File:
    """Open a stage's input file read-only, turning a missing or broken file into a RaytraceError."""
    p = Path(path)
    if not p.exists():
        raise RaytraceError(f"{p}: input file does not exist")
    try:
        return h5py.File(p, "r")
    except OSError as exc:
        raise RaytraceError(f"{p}: not a readable HDF5 file ({exc})") from None
