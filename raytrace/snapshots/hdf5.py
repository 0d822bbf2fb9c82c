"""HDF5 snapshot layout used by most public N-body codes.

A ``Header`` group with attributes ``BoxSize``, ``Redshift``, ``Time``,
``NumPart_ThisFile``, ``NumPart_Total``, ``MassTable``, ``Omega0``, ``OmegaLambda``,
``HubbleParam``, ``NumFilesPerSnapshot``; particles of species ``t`` in
``PartType<t>/Coordinates`` (and ``PartType<t>/Masses`` where ``MassTable[t]`` is 0).
Lengths are in Mpc/h unless ``Header`` (or a ``Units``/``Parameters`` group) carries
``UnitLength_in_cm``, or the configuration gives ``length_unit``. Masses are in
1e10 Msun/h (the layout's usual unit).
"""

from __future__ import annotations

from pathlib import Path
from typing import Iterator, Sequence

import h5py
import numpy as np

from ..errors import RaytraceError
from . import LENGTH_UNITS, Chunk, SnapshotHeader, check_chunk

REQUIRED = (
    "BoxSize",
    "Redshift",
    "Time",
    "NumPart_ThisFile",
    "NumPart_Total",
    "MassTable",
    "Omega0",
    "OmegaLambda",
    "HubbleParam",
    "NumFilesPerSnapshot",
)

#: 1 Mpc in cm (IAU 2012 astronomical unit and parsec definitions)
MPC_IN_CM = 3.0856775814913673e24


def _open(path: Path) -> h5py.File:
    try:
        return h5py.File(path, "r")
    except OSError as exc:
        raise RaytraceError(f"{path}: not a readable HDF5 snapshot ({exc})") from None


def _length_factor(f: h5py.File, path: Path, length_unit: str | None) -> float:
    if length_unit is not None:
        if length_unit not in LENGTH_UNITS:
            raise RaytraceError(f"length_unit: unknown unit {length_unit!r} (known: {', '.join(LENGTH_UNITS)})")
        return LENGTH_UNITS[length_unit]
    for group in ("Header", "Units", "Parameters"):
        if group in f and "UnitLength_in_cm" in f[group].attrs:
            unit_cm = float(f[group].attrs["UnitLength_in_cm"])
            # lengths in these files are comoving and in units of h^-1 (UnitLength_in_cm per h)
            return unit_cm / MPC_IN_CM
    return 1.0


def read_header(files: Sequence[Path], length_unit: str | None) -> SnapshotHeader:
    per_file, first = [], None
    for path in files:
        with _open(path) as f:
            if "Header" not in f:
                raise RaytraceError(f"{path}: no Header group")
            attrs = f["Header"].attrs
            missing = [k for k in REQUIRED if k not in attrs]
            if missing:
                raise RaytraceError(f"{path}: Header is missing attribute {missing[0]}")
            this = np.asarray(attrs["NumPart_ThisFile"], dtype=np.int64)
            per_file.append({t: int(n) for t, n in enumerate(this) if n > 0})
            for t, n in per_file[-1].items():
                key = f"PartType{t}/Coordinates"
                if key not in f:
                    raise RaytraceError(f"{path}: NumPart_ThisFile[{t}] = {n} but {key} is missing")
                if f[key].shape[0] != n:
                    raise RaytraceError(
                        f"{path}: {key} holds {f[key].shape[0]} particles, NumPart_ThisFile[{t}] says {n}"
                    )
            if first is None:
                factor = _length_factor(f, path, length_unit)
                n_files = int(attrs["NumFilesPerSnapshot"])
                total = np.asarray(attrs["NumPart_Total"], dtype=np.int64)
                if "NumPart_Total_HighWord" in attrs:
                    total = total + (np.asarray(attrs["NumPart_Total_HighWord"], dtype=np.int64) << 32)
                first = SnapshotHeader(
                    files=list(files),
                    box_mpc_h=float(attrs["BoxSize"]) * factor,
                    redshift=float(attrs["Redshift"]),
                    omega_m=float(attrs["Omega0"]),
                    omega_lambda=float(attrs["OmegaLambda"]),
                    h=float(attrs["HubbleParam"]),
                    n_total={t: int(n) for t, n in enumerate(total) if n > 0},
                    mass_table={t: float(m) for t, m in enumerate(np.asarray(attrs["MassTable"]))},
                    length_to_mpc_h=factor,
                )
    assert first is not None
    if len(files) != n_files:
        raise RaytraceError(
            f"{files[0]}: NumFilesPerSnapshot is {n_files} but {len(files)} file(s) of this snapshot were found"
        )
    for t, n in first.n_total.items():
        found = sum(pf.get(t, 0) for pf in per_file)
        if found != n:
            raise RaytraceError(f"{files[0]}: NumPart_Total[{t}] is {n} but the files hold {found} particles")
    first.n_per_file = per_file
    return first


def iter_chunks(header: SnapshotHeader, species: list[int], chunk_size: int) -> Iterator[Chunk]:
    for t in species:
        if header.n_total.get(t, 0) == 0:
            raise RaytraceError(f"{header.files[0]}: snapshot holds no particles of species {t} (PartType{t})")
    for path, counts in zip(header.files, header.n_per_file):
        with _open(path) as f:
            for t in species:
                n = counts.get(t, 0)
                if n == 0:
                    continue
                coords = f[f"PartType{t}/Coordinates"]
                masses = f[f"PartType{t}/Masses"] if f"PartType{t}/Masses" in f else None
                if masses is None and header.mass_table.get(t, 0.0) <= 0.0:
                    raise RaytraceError(f"{path}: MassTable[{t}] is 0 and PartType{t}/Masses is missing")
                for start in range(0, n, chunk_size):
                    stop = min(start + chunk_size, n)
                    try:
                        pos = np.asarray(coords[start:stop], dtype=np.float64)
                        m = (
                            np.asarray(masses[start:stop], dtype=np.float64)
                            if masses is not None
                            else np.full(stop - start, header.mass_table[t])
                        )
                    except OSError as exc:
                        raise RaytraceError(f"{path}: cannot read PartType{t} ({exc})") from None
                    if header.length_to_mpc_h != 1.0:
                        pos *= header.length_to_mpc_h
                    chunk = Chunk(t, pos, m)
                    check_chunk(chunk, header, path)
                    yield chunk


def write_snapshot(
    paths: Sequence[Path],
    positions: dict[int, np.ndarray],
    mass_table: dict[int, float],
    *,
    box_mpc_h: float,
    redshift: float,
    omega_m: float,
    omega_lambda: float,
    h: float,
    masses: dict[int, np.ndarray] | None = None,
    extra_header: dict | None = None,
) -> None:
    """Write one snapshot split evenly over ``paths`` (atomically, file by file)."""
    from ..hdf5 import atomic_file

    n_files = len(paths)
    n_types = max(6, max(positions) + 1)
    total = np.zeros(n_types, dtype=np.int64)
    mt = np.zeros(n_types)
    for t, pos in positions.items():
        total[t] = len(pos)
        mt[t] = mass_table.get(t, 0.0)
    splits = {t: np.array_split(np.arange(len(pos)), n_files) for t, pos in positions.items()}
    for i, path in enumerate(paths):
        this = np.zeros(n_types, dtype=np.int64)
        with atomic_file(path) as tmp:
            with h5py.File(tmp, "w") as f:
                for t, pos in positions.items():
                    idx = splits[t][i]
                    this[t] = len(idx)
                    g = f.create_group(f"PartType{t}")
                    g.create_dataset("Coordinates", data=pos[idx[0] : idx[-1] + 1] if len(idx) else pos[:0])
                    if masses is not None and t in masses:
                        g.create_dataset("Masses", data=masses[t][idx[0] : idx[-1] + 1] if len(idx) else masses[t][:0])
                hd = f.create_group("Header")
                hd.attrs["BoxSize"] = box_mpc_h
                hd.attrs["Redshift"] = redshift
                hd.attrs["Time"] = 1.0 / (1.0 + redshift)
                hd.attrs["NumPart_ThisFile"] = this.astype(np.int32)
                hd.attrs["NumPart_Total"] = (total & 0xFFFFFFFF).astype(np.uint32)
                hd.attrs["NumPart_Total_HighWord"] = (total >> 32).astype(np.uint32)
                hd.attrs["MassTable"] = mt
                hd.attrs["Omega0"] = omega_m
                hd.attrs["OmegaLambda"] = omega_lambda
                hd.attrs["HubbleParam"] = h
                hd.attrs["NumFilesPerSnapshot"] = n_files
                for k, v in (extra_header or {}).items():
                    hd.attrs[k] = v
