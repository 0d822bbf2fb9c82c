"""HDF5 snapshot layout used by most public N-body codes.

A ``Header`` group with attributes ``BoxSize``, ``Redshift``, ``Time``,
``NumPart_ThisFile``, ``NumPart_Total``, ``MassTable``, ``Omega0``, ``OmegaLambda``,
``HubbleParam``, ``NumFilesPerSnapshot``; particles of species ``t`` in
``PartType<t>/Coordinates`` (and ``PartType<t>/Masses`` where ``MassTable[t]`` is 0).
Lengths are comoving, in h^-1 times ``UnitLength_in_cm`` when ``Header`` (or a
``Units``/``Parameters`` group) carries it, else in the configured ``length_unit``,
else in Mpc/h; a configured unit that contradicts ``UnitLength_in_cm`` is an error.
Masses are in h^-1 times ``UnitMass_in_g`` when it is given, else in 1e10 Msun/h (the
layout's usual unit). Values within 0.1% of 1 kpc, 1 Mpc or 1e10 Msun are taken as
exactly those units (codes round the parsec and the solar mass differently: 1.989e43 g
for 1e10 Msun is 3e-4 above the IAU value).
Several species are read with their own masses: ``PartType<t>/Masses`` where present,
else ``MassTable[t]``.
"""

from __future__ import annotations

from pathlib import Path
from typing import Iterator, Sequence

import h5py
import numpy as np

from ..errors import RaytraceError
from . import (
    LENGTH_UNITS,
    Chunk,
    ChunkSpec,
    FileSummary,
    SnapshotHeader,
    check_chunk,
    check_species,
    chunk_plan,
    missing_file_names,
)

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
#: 1e10 nominal solar masses in g (IAU 2015 Resolution B3, GM_sun over CODATA 2018 G)
MASS_1E10_MSUN_IN_G = 1.98841e43
#: relative tolerance within which a unit is taken as the named one
UNIT_SNAP = 1e-3


def _open(path: Path) -> h5py.File:
    try:
        return h5py.File(path, "r")
    except OSError as exc:
        raise RaytraceError(f"{path}: not a readable HDF5 snapshot ({exc})") from None


def _unit_attr(f: h5py.File, name: str) -> float | None:
    for group in ("Header", "Units", "Parameters"):
        if group in f and name in f[group].attrs:
            return float(np.asarray(f[group].attrs[name]).ravel()[0])
    return None


def _snap(factor: float, named: float) -> float:
    return named if abs(factor / named - 1.0) < UNIT_SNAP else factor


def _length_factor(f: h5py.File, path: Path, length_unit: str | None) -> float:
    if length_unit is not None and length_unit not in LENGTH_UNITS:
        raise RaytraceError(f"length_unit: unknown unit {length_unit!r} (known: {', '.join(LENGTH_UNITS)})")
    unit_cm = _unit_attr(f, "UnitLength_in_cm")
    if unit_cm is None:
        return LENGTH_UNITS[length_unit] if length_unit is not None else 1.0
    if not (np.isfinite(unit_cm) and unit_cm > 0):
        raise RaytraceError(f"{path}: UnitLength_in_cm is {unit_cm!r}, expected a positive value")
    # lengths in these files are comoving and in units of h^-1 (UnitLength_in_cm per h)
    factor = unit_cm / MPC_IN_CM
    for named in LENGTH_UNITS.values():
        factor = _snap(factor, named)
    if length_unit is not None and abs(factor / LENGTH_UNITS[length_unit] - 1.0) > UNIT_SNAP:
        raise RaytraceError(
            f"{path}: length_unit {length_unit} contradicts the file's UnitLength_in_cm = {unit_cm:g} "
            f"({factor:g} Mpc/h); leave length_unit out or correct it"
        )
    return factor


def _mass_factor(f: h5py.File, path: Path) -> float:
    unit_g = _unit_attr(f, "UnitMass_in_g")
    if unit_g is None:
        return 1.0
    if not (np.isfinite(unit_g) and unit_g > 0):
        raise RaytraceError(f"{path}: UnitMass_in_g is {unit_g!r}, expected a positive value")
    return _snap(unit_g / MASS_1E10_MSUN_IN_G, 1.0)


def file_summary(path: Path, length_unit: str | None) -> FileSummary:
    """The snapshot-identifying header fields of one file."""
    with _open(path) as f:
        if "Header" not in f:
            raise RaytraceError(f"{path}: no Header group")
        attrs = f["Header"].attrs
        for k in ("Redshift", "BoxSize", "NumFilesPerSnapshot", "NumPart_Total"):
            if k not in attrs:
                raise RaytraceError(f"{path}: Header is missing attribute {k}")
        total = np.asarray(attrs["NumPart_Total"], dtype=np.int64)
        if "NumPart_Total_HighWord" in attrs:
            total = total + (np.asarray(attrs["NumPart_Total_HighWord"], dtype=np.int64) << 32)
        return FileSummary(
            path=path,
            redshift=float(attrs["Redshift"]),
            box_mpc_h=float(attrs["BoxSize"]) * _length_factor(f, path, length_unit),
            num_files=int(attrs["NumFilesPerSnapshot"]),
            n_total={t: int(n) for t, n in enumerate(total) if n > 0},
        )


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
                mass_factor = _mass_factor(f, path)
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
                    mass_table={t: float(m) * mass_factor for t, m in enumerate(np.asarray(attrs["MassTable"]))},
                    length_to_mpc_h=factor,
                    mass_to_1e10_msun_h=mass_factor,
                )
                first_attrs = {k: np.asarray(attrs[k]) for k in ("BoxSize", "Redshift", "NumPart_Total", "MassTable")}
            else:
                for k, v in first_attrs.items():
                    if not np.array_equal(np.asarray(attrs[k]), v):
                        raise RaytraceError(
                            f"{path}: Header {k} is {np.asarray(attrs[k]).tolist()} but {v.tolist()} in {files[0]}"
                        )
    assert first is not None
    if len(files) != n_files:
        missing = missing_file_names(files, n_files)
        detail = f" (missing: {', '.join(missing[:3])}{', ...' if len(missing) > 3 else ''})" if missing else ""
        raise RaytraceError(
            f"{files[0]}: NumFilesPerSnapshot is {n_files} but {len(files)} file(s) of this snapshot were found{detail}"
        )
    for t, n in first.n_total.items():
        found = sum(pf.get(t, 0) for pf in per_file)
        if found != n:
            raise RaytraceError(f"{files[0]}: NumPart_Total[{t}] is {n} but the files hold {found} particles")
    first.n_per_file = per_file
    return first


def iter_chunks(header: SnapshotHeader, species: list[int], chunk_size: int) -> Iterator[Chunk]:
    """All particles of ``species``, file by file, in chunks of at most ``chunk_size``."""
    check_species(header, species)
    yield from read_chunks(header, chunk_plan(header, species, chunk_size))


def read_chunks(header: SnapshotHeader, specs: Sequence[ChunkSpec]) -> Iterator[Chunk]:
    """The particles of each spec, in order; a file stays open for consecutive specs."""
    f, open_index = None, -1
    try:
        for spec in specs:
            path = header.files[spec.file_index]
            if spec.file_index != open_index:
                if f is not None:
                    f.close()
                f, open_index = _open(path), spec.file_index
            t = spec.species
            coords = f[f"PartType{t}/Coordinates"]
            masses = f[f"PartType{t}/Masses"] if f"PartType{t}/Masses" in f else None
            if masses is None and header.mass_table.get(t, 0.0) <= 0.0:
                raise RaytraceError(f"{path}: MassTable[{t}] is 0 and PartType{t}/Masses is missing")
            if masses is not None and masses.shape[0] != coords.shape[0]:
                raise RaytraceError(
                    f"{path}: PartType{t}/Masses holds {masses.shape[0]} values for {coords.shape[0]} particles"
                )
            if coords.ndim != 2 or coords.shape[1] != 3:
                raise RaytraceError(f"{path}: PartType{t}/Coordinates has shape {coords.shape}, expected (n, 3)")
            try:
                pos = np.empty((spec.count, 3), dtype=np.float64)
                coords.read_direct(pos, np.s_[spec.start : spec.stop])
                if masses is not None:
                    m = np.empty(spec.count, dtype=np.float64)
                    masses.read_direct(m, np.s_[spec.start : spec.stop])
                    if header.mass_to_1e10_msun_h != 1.0:
                        m *= header.mass_to_1e10_msun_h
                else:
                    m = np.full(spec.count, header.mass_table[t])
            except (OSError, TypeError) as exc:
                raise RaytraceError(f"{path}: cannot read PartType{t} ({exc})") from None
            if header.length_to_mpc_h != 1.0:
                pos *= header.length_to_mpc_h
            chunk = Chunk(t, pos, m)
            check_chunk(chunk, header, path)
            del pos, m
            yield chunk
            del chunk  # hold no particles while the next chunk is read
    finally:
        if f is not None:
            f.close()


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
