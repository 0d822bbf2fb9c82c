"""Particle snapshot readers.

Every reader turns the files of one snapshot into a :class:`SnapshotHeader` and reads
:class:`Chunk` objects (positions in Mpc/h, masses in 1e10 Msun/h, one species per
chunk), so that slicing never holds more than one chunk of particles. A new format is
one module here exposing ``read_header(files, length_unit)``,
``file_summary(path, length_unit)`` (what groups files into snapshots) and
``read_chunks(header, specs)`` (the particles of each :class:`ChunkSpec`, in order),
plus its name in ``FORMATS``. This package plans the chunks (:func:`chunk_plan`) and,
for parallel slicing, gives each MPI rank its contiguous share of the particles.
"""

from __future__ import annotations

import importlib
import re
import struct
from dataclasses import dataclass, field
from pathlib import Path
from typing import Iterator, Sequence

import numpy as np

from ..errors import RaytraceError

#: critical density in units of 1e10 Msun/h per (Mpc/h)^3: 3 H0^2 / (8 pi G) with
#: H0 = 100 h km/s/Mpc is 2.77536627e11 h^2 Msun/Mpc^3 (standard value, e.g. the
#: Particle Data Group's astrophysical constants table).
RHO_CRIT_1E10_MSUN_H_PER_MPC_H3 = 27.7536627

FORMATS = {"hdf5": "hdf5", "legacy-binary": "legacy_binary"}
#: what ``format`` may say: a format name, or ``auto`` (detected from the first bytes)
FORMAT_CHOICES = (*FORMATS, "auto")

#: length unit name -> factor converting to Mpc/h
LENGTH_UNITS = {"Mpc/h": 1.0, "kpc/h": 1.0e-3}


@dataclass
class SnapshotHeader:
    """What slicing needs to know about one snapshot (all of its files)."""

    files: list[Path]
    box_mpc_h: float
    redshift: float
    omega_m: float
    omega_lambda: float
    h: float
    #: particles per species over all files
    n_total: dict[int, int]
    #: constant particle mass per species (1e10 Msun/h), 0 where masses are per particle
    mass_table: dict[int, float]
    #: factor converting file lengths to Mpc/h
    length_to_mpc_h: float = 1.0
    #: particles per species in each file
    n_per_file: list[dict[int, int]] = field(default_factory=list)
    #: factor converting file masses to 1e10 Msun/h
    mass_to_1e10_msun_h: float = 1.0
    #: the reader that read it (a name in FORMATS)
    fmt: str = ""

    @property
    def scale_factor(self) -> float:
        return 1.0 / (1.0 + self.redshift)


@dataclass
class Chunk:
    species: int
    positions: np.ndarray  # (n, 3) float, Mpc/h, inside [0, box)
    masses: np.ndarray  # (n,) float, 1e10 Msun/h


@dataclass(frozen=True)
class FileSummary:
    """The header fields of one file that say which snapshot it belongs to."""

    path: Path
    redshift: float
    box_mpc_h: float
    num_files: int
    n_total: dict[int, int]


def file_summary(path: str | Path, fmt: str, length_unit: str | None = None) -> FileSummary:
    """Redshift, box, file count and particle totals from the header of one file."""
    return reader_module(fmt).file_summary(Path(path), length_unit)


_NUMBERED = re.compile(r"^(?P<stem>.*)\.(?P<index>\d+)(?P<ext>\.hdf5|\.h5)?$")


def file_number(path: str | Path) -> tuple[str, int] | None:
    """(base name, file number) of ``name.<n>`` or ``name.<n>.hdf5``, else None."""
    m = _NUMBERED.match(Path(path).name)
    return (m["stem"] + (m["ext"] or ""), int(m["index"])) if m else None


def missing_file_names(files: Sequence[Path], num_files: int) -> list[str]:
    """Names of the files ``name.0 .. name.<num_files-1>`` (same suffix) absent from ``files``."""
    keyed = [file_number(f) for f in files]
    if not files or any(k is None for k in keyed) or len({k[0] for k in keyed}) != 1:
        return []
    m = _NUMBERED.match(Path(files[0]).name)
    have = {k[1] for k in keyed}
    return [str(Path(files[0]).with_name(f"{m['stem']}.{i}{m['ext'] or ''}")) for i in range(num_files) if i not in have]


@dataclass(frozen=True)
class ChunkSpec:
    """Particles ``start:stop`` of species ``species`` in file ``file_index`` of a snapshot."""

    file_index: int
    species: int
    start: int
    stop: int

    @property
    def count(self) -> int:
        return self.stop - self.start


def check_species(header: SnapshotHeader, species: Sequence[int]) -> None:
    """Every requested species must have particles in the snapshot."""
    for t in species:
        if header.n_total.get(t, 0) == 0:
            raise RaytraceError(
                f"{header.files[0]}: snapshot holds no particles of species {t} "
                f"(it holds species {', '.join(map(str, sorted(header.n_total))) or 'none'})"
            )


def chunk_plan(
    header: SnapshotHeader, species: Sequence[int], chunk_size: int, rank: int = 0, size: int = 1
) -> list[ChunkSpec]:
    """The chunks to read: file by file, species by species, at most ``chunk_size`` particles each.

    With ``size`` > 1 the particles of all files, in that order, are cut into ``size``
    contiguous shares of equal count (to one particle), and only share ``rank`` is
    planned: each rank reads whole files where it can and parts of at most two others.
    """
    if chunk_size < 1:
        raise RaytraceError(f"chunk_size: must be at least 1, got {chunk_size}")
    if len(header.n_per_file) != len(header.files):
        raise ValueError("header.n_per_file must give the particle counts of every file (readers fill it)")
    segments = [(i, t, counts.get(t, 0)) for i, counts in enumerate(header.n_per_file) for t in species]
    n_all = sum(n for _, _, n in segments)
    lo, hi = rank * n_all // size, (rank + 1) * n_all // size
    plan, offset = [], 0
    for i, t, n in segments:
        a, b = max(lo - offset, 0), min(hi - offset, n)
        for start in range(a, b, chunk_size):
            plan.append(ChunkSpec(i, t, start, min(start + chunk_size, b)))
        offset += n
    return plan


def reader_module(fmt: str):
    if fmt not in FORMATS:
        raise RaytraceError(f"format: unknown snapshot format {fmt!r} (known: {', '.join(FORMATS)})")
    return importlib.import_module(f"{__name__}.{FORMATS[fmt]}")


#: HDF5 file signature; the superblock sits at offset 0 or, after a user block, at
#: 512, 1024, 2048, ... bytes (HDF5 file format specification, "Format Signature")
_HDF5_SIGNATURE = b"\x89HDF\r\n\x1a\n"


def detect_format(path: str | Path) -> str:
    """``"hdf5"`` or ``"legacy-binary"`` from the first bytes of ``path``.

    The legacy layout starts with a record marker: 256 (the header record) or 8 (a
    block label record holding ``HEAD``) in either byte order; the reader then checks
    every marker itself, so a damaged legacy file is reported by the reader.
    """
    path = Path(path)
    try:
        with open(path, "rb") as f:
            head = f.read(8)
            if head == _HDF5_SIGNATURE:
                return "hdf5"
            if len(head) == 8:
                for bo in ("<", ">"):
                    (first,) = struct.unpack(bo + "i", head[:4])
                    if first == 256 or (first == 8 and head[4:8] == b"HEAD"):
                        return "legacy-binary"
            size, offset = f.seek(0, 2), 512
            while offset + 8 <= size:
                f.seek(offset)
                if f.read(8) == _HDF5_SIGNATURE:
                    return "hdf5"
                offset *= 2
    except OSError as exc:
        raise RaytraceError(f"{path}: cannot read snapshot file ({exc})") from None
    raise RaytraceError(
        f"{path}: neither an HDF5 file nor a legacy binary snapshot (first bytes {head.hex() or 'none: empty file'})"
    )


def resolve_format(files: Sequence[str | Path], fmt: str = "auto") -> str:
    """``fmt`` itself, or for ``auto`` the format every one of ``files`` is detected as."""
    if fmt != "auto":
        reader_module(fmt)  # rejects unknown names
        return fmt
    found = {Path(f): detect_format(f) for f in files}
    kinds = sorted(set(found.values()))
    if len(kinds) > 1:
        by_kind = {k: next(str(f) for f, v in found.items() if v == k) for k in kinds}
        raise RaytraceError(
            "format: the files of one snapshot mix formats (" + ", ".join(f"{v} is {k}" for k, v in by_kind.items()) + ")"
        )
    return kinds[0]


def read_header(files: Sequence[str | Path], fmt: str = "hdf5", length_unit: str | None = None) -> SnapshotHeader:
    """Header of the snapshot made of ``files`` (all files of one snapshot, any order).

    ``fmt`` is a name in :data:`FORMATS` or ``auto``; the header's ``fmt`` attribute
    then says which reader :func:`iter_chunks` uses.
    """
    files = [Path(f) for f in files]
    if not files:
        raise RaytraceError("snapshot: no files given")
    for f in files:
        if not f.exists():
            raise RaytraceError(f"{f}: snapshot file does not exist")
    fmt = resolve_format(files, fmt)
    header = reader_module(fmt).read_header(files, length_unit)
    header.fmt = fmt
    return header


def iter_chunks(
    header: SnapshotHeader,
    species: Sequence[int],
    fmt: str | None = None,
    chunk_size: int = 1 << 21,
    rank: int = 0,
    size: int = 1,
) -> Iterator[Chunk]:
    """Stream the particles of the chosen species in chunks of at most ``chunk_size``.

    ``fmt`` defaults to the format the header was read with. With ``size`` > 1 only
    this ``rank``'s share is read (see :func:`chunk_plan`).
    """
    fmt = fmt or getattr(header, "fmt", None) or "hdf5"
    species = list(species)
    check_species(header, species)
    # readers call check_chunk themselves, so that errors name the file at fault
    yield from reader_module(fmt).read_chunks(header, chunk_plan(header, species, chunk_size, rank, size))


def _position_range(pos: np.ndarray) -> tuple[bool, float, float]:
    """(all finite, min, max) of ``pos`` in one compiled pass."""
    from ._check import position_range

    finite, lo, hi = position_range(np.ascontiguousarray(pos))
    return bool(finite), float(lo), float(hi)


def check_chunk(chunk: Chunk, header: SnapshotHeader, source: str | Path = "") -> None:
    """Reject NaN or out-of-box positions with the file named."""
    pos = chunk.positions
    where = source or (header.files[0] if len(header.files) == 1 else header.files[0].parent)
    finite, lo, hi = _position_range(pos)
    if not finite:
        raise RaytraceError(f"{where}: non-finite particle positions in species {chunk.species}")
    lo, hi = min(lo, 0.0), max(hi, 0.0)
    # a tolerance of one part in 1e6 allows float32 rounding at the box edge
    if lo < -1e-6 * header.box_mpc_h or hi > header.box_mpc_h * (1 + 1e-6):
        raise RaytraceError(
            f"{where}: particle positions outside the box [0, {header.box_mpc_h}] Mpc/h (range {lo:g} to {hi:g})"
        )
