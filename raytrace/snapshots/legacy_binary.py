"""Legacy binary snapshot layout (Fortran unformatted sequential records).

Every record is framed by two 4-byte integers holding the record length in bytes,
one before and one after the data. The first record is the 256-byte header::

    offset  field                        type
         0  npart[6]                     int32    particles of each type in this file
        24  mass[6]                      float64  mass table (1e10 Msun/h), 0: per-particle
        72  time                         float64  scale factor
        80  redshift                     float64
        88  flag_sfr, flag_feedback      int32
        96  npartTotal[6]                uint32   low words of the total counts
       120  flag_cooling                 int32
       124  num_files                    int32
       128  BoxSize                      float64
       136  Omega0, OmegaLambda,         float64
            HubbleParam
       160  flag_stellarage, flag_metals int32
       168  npartTotalHighWord[6]        uint32
       192  flag_entropy_instead_u       int32
       196  padding to 256 bytes

followed by the blocks POS (3 floats per particle, all types in type order), VEL
(same shape), ID (int32 or int64 per particle) and MASS (one float per particle of
the types with ``mass[t] == 0`` and ``npart[t] > 0``). In the block-labelled variant
each record is preceded by an 8-byte record holding a 4-character label (``HEAD``,
``POS ``, ``VEL ``, ``ID  ``, ``MASS``, ...) and an int32 with the length of the next
record plus 8.

The byte order is taken from the first record marker (256, or 8 in the labelled
variant, in either byte order), the float width of POS and MASS from their record
lengths. A snapshot split over several files is named ``name.0``, ``name.1``, ...
and every header carries ``num_files``. The header has no length unit, so the caller
must name it (``length_unit``, one of :data:`raytrace.snapshots.LENGTH_UNITS`).

The reader never loads a whole file: :func:`read_header` only follows the record
markers (a seek and two 4-byte reads per record) and :func:`iter_chunks` reads
positions and masses at most ``chunk_size`` particles at a time from file offsets.
"""

from __future__ import annotations

import re
import struct
from dataclasses import dataclass, field
from pathlib import Path
from typing import BinaryIO, Iterator, Mapping, Sequence

import numpy as np

from ..errors import RaytraceError
from . import LENGTH_UNITS, Chunk, ChunkSpec, FileSummary, SnapshotHeader, check_chunk, check_species, chunk_plan

N_TYPES = 6
HEADER_BYTES = 256
LABEL_BYTES = 8

#: header fields in file order (see the module docstring for their offsets)
_HEADER_FORMAT = "6i6dddii6Iiiddddii6Ii"
_HEADER_USED = struct.calcsize("<" + _HEADER_FORMAT)  # 196; the rest is padding

_SUFFIX = re.compile(r"^(?P<stem>.*)\.(?P<index>\d+)$")


@dataclass
class _Record:
    label: str | None  # the block label in the labelled variant, else None
    offset: int  # offset of the leading marker
    data_offset: int
    length: int


@dataclass
class _FileLayout:
    """Where the particle data of one file sit."""

    byteorder: str
    npart: list[int]
    mass: list[float]
    pos_offset: int
    pos_dtype: np.dtype | None  # None when the file holds no particles
    mass_offset: int
    mass_dtype: np.dtype | None  # None when the file has no MASS block


@dataclass
class LegacyHeader(SnapshotHeader):
    """:class:`SnapshotHeader` plus the block offsets found while reading the headers."""

    layouts: list[_FileLayout] = field(default_factory=list)


@dataclass
class _RawHeader:
    npart: list[int]
    mass: list[float]
    time: float
    redshift: float
    n_total: list[int]
    num_files: int
    box: float
    omega_m: float
    omega_lambda: float
    h: float


# --------------------------------------------------------------------------- reading


def _length_factor(length_unit: str | None, first: Path) -> float:
    if length_unit is None:
        raise RaytraceError(
            f"length_unit: required for the legacy-binary snapshot {first}, whose header carries no length unit "
            f"(set suite.models.<name>.length_unit to one of {', '.join(LENGTH_UNITS)})"
        )
    if length_unit not in LENGTH_UNITS:
        raise RaytraceError(f"length_unit: unknown unit {length_unit!r} (known: {', '.join(LENGTH_UNITS)})")
    return LENGTH_UNITS[length_unit]


def _order_files(files: Sequence[Path]) -> list[Path]:
    """Files of one snapshot in file-number order (``name.0``, ``name.1``, ...)."""
    files = [Path(f) for f in files]
    if len(files) == 1:
        return files
    keyed, stems = [], set()
    for f in files:
        m = _SUFFIX.match(f.name)
        if m is None:
            raise RaytraceError(f"{f}: a file of a multi-file snapshot must be named <name>.<file number>")
        stems.add((f.parent, m["stem"]))
        keyed.append((int(m["index"]), f))
    if len(stems) > 1:
        raise RaytraceError(f"{files[0]}: the files given belong to different snapshots ({len(stems)} base names)")
    keyed.sort()
    for (i, f), (j, _) in zip(keyed, keyed[1:]):
        if i == j:
            raise RaytraceError(f"{f}: file number {i} given twice")
    return [f for _, f in keyed]


def _missing_files(ordered: list[Path], num_files: int) -> list[str]:
    """Names of the files ``name.0 .. name.<num_files-1>`` not among ``ordered``."""
    m = _SUFFIX.match(ordered[0].name)
    if m is None:  # a lone file without a file number: nothing to name
        return []
    have = {int(_SUFFIX.match(f.name)["index"]) for f in ordered if _SUFFIX.match(f.name)}
    return [str(ordered[0].with_name(f"{m['stem']}.{i}")) for i in range(num_files) if i not in have]


def _detect_byteorder(path: Path, first4: bytes) -> tuple[str, bool]:
    """(byte order, labelled) from the first record marker."""
    if len(first4) < 4:
        raise RaytraceError(f"{path}: truncated: {len(first4)} byte(s), no record marker at offset 0")
    for bo in ("<", ">"):
        (value,) = struct.unpack(bo + "i", first4)
        if value == HEADER_BYTES:
            return bo, False
        if value == LABEL_BYTES:
            return bo, True
    little, big = struct.unpack("<i", first4)[0], struct.unpack(">i", first4)[0]
    raise RaytraceError(
        f"{path}: first record marker is {little} (little-endian) / {big} (big-endian), "
        f"neither {HEADER_BYTES} (header) nor {LABEL_BYTES} (block label): not a legacy binary snapshot"
    )


def _read_marker(f: BinaryIO, path: Path, offset: int, bo: str, size: int, what: str) -> int:
    if offset + 4 > size:
        raise RaytraceError(
            f"{path}: truncated: {what} at offset {offset} lies past the end of the file ({size} bytes)"
        )
    f.seek(offset)
    return struct.unpack(bo + "I", f.read(4))[0]


def _scan_records(f: BinaryIO, path: Path, bo: str, labelled: bool) -> list[_Record]:
    """Follow the record markers through the whole file, checking every pair."""
    size = f.seek(0, 2)
    records: list[_Record] = []
    offset = 0
    expect_next: int | None = None  # from the preceding label record
    label: str | None = None
    while offset < size:
        lead = _read_marker(f, path, offset, bo, size, "record marker")
        end = offset + 4 + lead
        if end + 4 > size:
            raise RaytraceError(
                f"{path}: truncated: record at offset {offset} claims {lead} bytes but the file ends at {size}"
            )
        trail = _read_marker(f, path, end, bo, size, "closing record marker")
        if trail != lead:
            raise RaytraceError(f"{path}: record marker {trail} does not match {lead} at offset {offset}")
        if labelled and expect_next is None:
            if lead != LABEL_BYTES:
                raise RaytraceError(
                    f"{path}: expected an {LABEL_BYTES}-byte block label record at offset {offset}, found {lead} bytes"
                )
            f.seek(offset + 4)
            raw = f.read(LABEL_BYTES)
            try:
                label = raw[:4].decode("ascii")
            except UnicodeDecodeError:
                raise RaytraceError(f"{path}: block label at offset {offset} is not ASCII ({raw[:4]!r})") from None
            (expect_next,) = struct.unpack(bo + "I", raw[4:])
        else:
            if labelled:
                assert expect_next is not None
                if expect_next != lead + 8:
                    raise RaytraceError(
                        f"{path}: block label {label!r} announces {expect_next - 8} bytes "
                        f"but the record at offset {offset} holds {lead}"
                    )
            records.append(_Record(label.strip() if labelled else None, offset, offset + 4, lead))
            expect_next, label = None, None
        offset = end + 4
    if expect_next is not None:
        raise RaytraceError(f"{path}: truncated: the file ends after block label {label!r} without its block")
    return records


def _parse_header(f: BinaryIO, path: Path, rec: _Record, bo: str) -> _RawHeader:
    if rec.length != HEADER_BYTES:
        raise RaytraceError(f"{path}: header record holds {rec.length} bytes, expected {HEADER_BYTES}")
    f.seek(rec.data_offset)
    v = struct.unpack(bo + _HEADER_FORMAT, f.read(_HEADER_USED))
    npart, mass = list(v[0:6]), list(v[6:12])
    time, redshift = v[12], v[13]
    low = v[16:22]
    num_files, box, omega_m, omega_lambda, h = v[23], v[24], v[25], v[26], v[27]
    high = v[30:36]
    n_total = [int(lo) + (int(hi) << 32) for lo, hi in zip(low, high)]
    for t in range(N_TYPES):
        if npart[t] < 0:
            raise RaytraceError(f"{path}: header npart[{t}] is negative ({npart[t]})")
        if not (np.isfinite(mass[t]) and mass[t] >= 0.0):
            raise RaytraceError(f"{path}: header mass[{t}] is {mass[t]!r}, expected a finite value >= 0")
    if num_files < 1:
        raise RaytraceError(f"{path}: header num_files is {num_files}, expected at least 1")
    if not (np.isfinite(box) and box > 0.0):
        raise RaytraceError(f"{path}: header BoxSize is {box!r}, expected a finite value > 0")
    if not (np.isfinite(redshift) and redshift > -1.0):
        raise RaytraceError(f"{path}: header redshift is {redshift!r}, expected a finite value > -1")
    for name, value in (("Omega0", omega_m), ("OmegaLambda", omega_lambda), ("HubbleParam", h)):
        if not np.isfinite(value):
            raise RaytraceError(f"{path}: header {name} is {value!r}")
    return _RawHeader(npart, mass, time, redshift, n_total, num_files, box, omega_m, omega_lambda, h)


def _float_dtype(path: Path, block: str, length: int, n_values: int, bo: str, what: str) -> np.dtype:
    for width in (4, 8):
        if length == n_values * width:
            return np.dtype(f"{bo}f{width}")
    raise RaytraceError(
        f"{path}: {block} record holds {length} bytes, expected {n_values} x 4 or x 8 for {what} (header counts)"
    )


def _scan_file(path: Path) -> tuple[_RawHeader, _FileLayout, bool]:
    """Header and block layout of one file, with every record marker checked."""
    try:
        with open(path, "rb") as f:
            bo, labelled = _detect_byteorder(path, f.read(4))
            records = _scan_records(f, path, bo, labelled)
            if labelled:
                blocks: dict[str, _Record] = {}
                for r in records:
                    assert r.label is not None
                    if r.label in blocks:
                        raise RaytraceError(f"{path}: block {r.label!r} appears twice")
                    blocks[r.label] = r
                if not records or records[0].label != "HEAD":
                    raise RaytraceError(f"{path}: the first block is not labelled 'HEAD'")
            else:
                names = ("HEAD", "POS", "VEL", "ID", "MASS")
                blocks = dict(zip(names, records))
            hdr = _parse_header(f, path, blocks["HEAD"], bo)
    except OSError as exc:
        raise RaytraceError(f"{path}: cannot read snapshot file ({exc})") from None

    n = sum(hdr.npart)
    n_mass = sum(hdr.npart[t] for t in range(N_TYPES) if hdr.mass[t] == 0.0)

    def block(name: str, needed: bool, why: str) -> _Record | None:
        rec = blocks.get(name)
        if rec is None and needed:
            if labelled:
                raise RaytraceError(f"{path}: no block labelled {name!r} although the header lists {why}")
            raise RaytraceError(
                f"{path}: block {name} is missing (the file ends after {len(records)} record(s)) "
                f"although the header lists {why}"
            )
        return rec

    # the standard layout always carries POS, VEL and ID when there are particles;
    # in the plain variant they must be present to locate MASS by position
    why = f"{n} particles"
    pos = block("POS", n > 0, why)
    vel = block("VEL", n > 0 and not labelled, why)
    ids = block("ID", n > 0 and not labelled, why)
    mass_rec = block("MASS", n_mass > 0, f"{n_mass} particles of types with mass table 0")

    pos_dtype = None
    if n > 0:
        assert pos is not None
        pos_dtype = _float_dtype(path, "POS", pos.length, 3 * n, bo, f"3 coordinates of {n} particles")
        if vel is not None and vel.length != pos.length:
            raise RaytraceError(f"{path}: VEL record holds {vel.length} bytes, POS holds {pos.length}")
        if ids is not None and ids.length not in (4 * n, 8 * n):
            raise RaytraceError(
                f"{path}: ID record holds {ids.length} bytes, expected {n} x 4 or x 8 for {n} particles (header counts)"
            )
    elif pos is not None and pos.length != 0:
        raise RaytraceError(f"{path}: POS record holds {pos.length} bytes but the header lists no particles")
    mass_dtype = None
    if n_mass > 0:
        assert mass_rec is not None
        mass_dtype = _float_dtype(
            path, "MASS", mass_rec.length, n_mass, bo, f"{n_mass} particles of types with mass table 0"
        )
    elif labelled and mass_rec is not None and mass_rec.length != 0:
        raise RaytraceError(
            f"{path}: MASS record holds {mass_rec.length} bytes but no type with particles has mass table 0"
        )
    layout = _FileLayout(
        byteorder=bo,
        npart=hdr.npart,
        mass=hdr.mass,
        pos_offset=pos.data_offset if pos is not None else 0,
        pos_dtype=pos_dtype,
        mass_offset=mass_rec.data_offset if (mass_rec is not None and n_mass > 0) else 0,
        mass_dtype=mass_dtype,
    )
    return hdr, layout, labelled


def file_summary(path: Path, length_unit: str | None) -> FileSummary:
    """The snapshot-identifying header fields of one file (every record marker checked)."""
    factor = _length_factor(length_unit, path)
    hdr, _, _ = _scan_file(path)
    return FileSummary(
        path=path,
        redshift=hdr.redshift,
        box_mpc_h=hdr.box * factor,
        num_files=hdr.num_files,
        n_total={t: n for t, n in enumerate(hdr.n_total) if n > 0},
    )


def read_header(files: Sequence[Path], length_unit: str | None) -> LegacyHeader:
    ordered = _order_files(files)
    factor = _length_factor(length_unit, ordered[0])
    first_hdr, first_layout, labelled = _scan_file(ordered[0])
    if first_hdr.num_files != len(ordered):
        missing = _missing_files(ordered, first_hdr.num_files)
        detail = f" (missing: {', '.join(missing[:3])}{', ...' if len(missing) > 3 else ''})" if missing else ""
        raise RaytraceError(
            f"{ordered[0]}: header num_files is {first_hdr.num_files} but {len(ordered)} file(s) "
            f"of this snapshot were given{detail}"
        )
    raws, layouts = [first_hdr], [first_layout]
    for path in ordered[1:]:
        hdr, layout, lab = _scan_file(path)
        if lab != labelled or layout.byteorder != first_layout.byteorder:
            raise RaytraceError(f"{path}: record layout or byte order differs from {ordered[0]}")
        for attr, name in (
            ("num_files", "num_files"),
            ("n_total", "npartTotal"),
            ("mass", "mass"),
            ("box", "BoxSize"),
            ("redshift", "redshift"),
        ):
            if getattr(hdr, attr) != getattr(first_hdr, attr):
                raise RaytraceError(
                    f"{path}: header {name} is {getattr(hdr, attr)} but {getattr(first_hdr, attr)} in {ordered[0]}"
                )
        raws.append(hdr)
        layouts.append(layout)
    for t in range(N_TYPES):
        found = sum(r.npart[t] for r in raws)
        if found != first_hdr.n_total[t]:
            raise RaytraceError(
                f"{ordered[0]}: header npartTotal[{t}] is {first_hdr.n_total[t]} "
                f"but the file(s) hold {found} particles of type {t}"
            )
    return LegacyHeader(
        files=ordered,
        box_mpc_h=first_hdr.box * factor,
        redshift=first_hdr.redshift,
        omega_m=first_hdr.omega_m,
        omega_lambda=first_hdr.omega_lambda,
        h=first_hdr.h,
        n_total={t: n for t, n in enumerate(first_hdr.n_total) if n > 0},
        mass_table={t: float(m) for t, m in enumerate(first_hdr.mass)},
        length_to_mpc_h=factor,
        n_per_file=[{t: n for t, n in enumerate(r.npart) if n > 0} for r in raws],
        layouts=layouts,
    )


def _read_values(f: BinaryIO, path: Path, offset: int, dtype: np.dtype, count: int, block: str) -> np.ndarray:
    f.seek(offset)
    values = np.fromfile(f, dtype=dtype, count=count)
    if values.size != count:
        raise RaytraceError(
            f"{path}: truncated: {block} block at offset {offset} ends after {values.size} of {count} values"
        )
    return values


def iter_chunks(header: SnapshotHeader, species: list[int], chunk_size: int) -> Iterator[Chunk]:
    """All particles of ``species``, file by file, in chunks of at most ``chunk_size``."""
    check_species(header, species)
    yield from read_chunks(header, chunk_plan(header, species, chunk_size))


def read_chunks(header: SnapshotHeader, specs: Sequence[ChunkSpec]) -> Iterator[Chunk]:
    """The particles of each spec, in order, read from file offsets (a file stays open for consecutive specs)."""
    layouts = header.layouts if isinstance(header, LegacyHeader) and header.layouts else None
    if layouts is None:  # a header rebuilt from its fields: find the blocks again
        layouts = [_scan_file(p)[1] for p in header.files]
    f, open_index = None, -1
    path = header.files[0]
    try:
        for spec in specs:
            path, lay, t = header.files[spec.file_index], layouts[spec.file_index], spec.species
            if spec.file_index != open_index:
                if f is not None:
                    f.close()
                f, open_index = open(path, "rb"), spec.file_index
            assert lay.pos_dtype is not None and spec.stop <= lay.npart[t]
            item = lay.pos_dtype.itemsize
            pos_start = lay.pos_offset + 3 * (sum(lay.npart[:t]) + spec.start) * item
            raw = _read_values(f, path, pos_start, lay.pos_dtype, 3 * spec.count, "POS")
            pos = raw.astype(np.float64).reshape(spec.count, 3)
            if header.length_to_mpc_h != 1.0:
                pos *= header.length_to_mpc_h
            if lay.mass[t] == 0.0:
                assert lay.mass_dtype is not None
                before = sum(lay.npart[u] for u in range(t) if lay.mass[u] == 0.0)
                mass_start = lay.mass_offset + (before + spec.start) * lay.mass_dtype.itemsize
                m = _read_values(f, path, mass_start, lay.mass_dtype, spec.count, "MASS").astype(np.float64)
            else:
                m = np.full(spec.count, lay.mass[t])
            chunk = Chunk(t, pos, m)
            check_chunk(chunk, header, path)
            del raw, pos, m
            yield chunk
            del chunk  # hold no particles while the next chunk is read
    except OSError as exc:
        raise RaytraceError(f"{path}: cannot read snapshot file ({exc})") from None
    finally:
        if f is not None:
            f.close()


# --------------------------------------------------------------------------- writing


def _framed(bo: str, payload: bytes) -> bytes:
    marker = struct.pack(bo + "I", len(payload))
    return marker + payload + marker


def _pack_header(
    bo: str,
    npart: Sequence[int],
    mass: Sequence[float],
    n_total: Sequence[int],
    *,
    num_files: int,
    box: float,
    redshift: float,
    omega_m: float,
    omega_lambda: float,
    h: float,
) -> bytes:
    low = [n & 0xFFFFFFFF for n in n_total]
    high = [n >> 32 for n in n_total]
    fields = struct.pack(
        bo + _HEADER_FORMAT,
        *npart,
        *mass,
        1.0 / (1.0 + redshift),
        redshift,
        0,  # flag_sfr
        0,  # flag_feedback
        *low,
        0,  # flag_cooling
        num_files,
        box,
        omega_m,
        omega_lambda,
        h,
        0,  # flag_stellarage
        0,  # flag_metals
        *high,
        0,  # flag_entropy_instead_u
    )
    return fields + bytes(HEADER_BYTES - len(fields))


def write_snapshot_legacy(
    paths: Sequence[str | Path],
    positions: Mapping[int, np.ndarray],
    mass_table: Mapping[int, float],
    *,
    box: float,
    redshift: float,
    omega_m: float,
    omega_lambda: float,
    h: float,
    labelled: bool = False,
    byteorder: str = "<",
    pos_dtype=np.float32,
    masses: Mapping[int, np.ndarray] | None = None,
) -> None:
    """Write one snapshot in the legacy binary layout, split evenly over ``paths``.

    ``positions[t]`` is an (n, 3) array of type ``t`` (0..5) in the file's length
    unit, the same unit as ``box``. Types with ``mass_table[t] == 0`` need per-particle
    ``masses[t]``, written to the MASS block. Velocities are written as zeros and IDs
    as 1, 2, ... in file and type order. Each file is written atomically.
    """
    from ..hdf5 import atomic_file

    if byteorder not in ("<", ">"):
        raise ValueError(f"byteorder must be '<' or '>', got {byteorder!r}")
    dt = np.dtype(pos_dtype).newbyteorder(byteorder)
    if dt.kind != "f" or dt.itemsize not in (4, 8):
        raise ValueError(f"pos_dtype must be float32 or float64, got {pos_dtype!r}")
    masses = dict(masses or {})
    pos = {}
    for t, p in positions.items():
        if not 0 <= t < N_TYPES:
            raise ValueError(f"particle type {t} outside 0..{N_TYPES - 1}")
        p = np.asarray(p)
        if p.ndim != 2 or p.shape[1] != 3:
            raise ValueError(f"positions[{t}] must have shape (n, 3), got {p.shape}")
        pos[t] = p
    mt = [float(mass_table.get(t, 0.0)) for t in range(N_TYPES)]
    for t, p in pos.items():
        if len(p) == 0:
            continue
        if mt[t] == 0.0:
            if t not in masses or len(masses[t]) != len(p):
                raise ValueError(f"type {t} has mass table 0 and needs masses[{t}] with {len(p)} entries")
        elif t in masses:
            raise ValueError(f"type {t} has mass table {mt[t]} and per-particle masses; give one or the other")
    n_files = len(paths)
    total = [len(pos[t]) if t in pos else 0 for t in range(N_TYPES)]
    id_dtype = np.dtype(byteorder + ("i4" if sum(total) < 2**31 else "i8"))
    splits = {t: np.array_split(np.arange(len(p)), n_files) for t, p in pos.items()}
    next_id = 1
    for i, path in enumerate(paths):
        idx = {t: splits[t][i] for t in pos}
        npart = [len(idx[t]) if t in idx else 0 for t in range(N_TYPES)]
        part = {t: slice(int(idx[t][0]), int(idx[t][-1]) + 1) for t in pos if len(idx[t])}
        n = sum(npart)
        blocks = [
            (
                "HEAD",
                _pack_header(
                    byteorder,
                    npart,
                    mt,
                    total,
                    num_files=n_files,
                    box=box,
                    redshift=redshift,
                    omega_m=omega_m,
                    omega_lambda=omega_lambda,
                    h=h,
                ),
            )
        ]
        pos_bytes = b"".join(np.ascontiguousarray(pos[t][s], dtype=dt).tobytes() for t, s in sorted(part.items()))
        blocks.append(("POS ", pos_bytes))
        blocks.append(("VEL ", bytes(len(pos_bytes))))
        blocks.append(("ID  ", np.arange(next_id, next_id + n, dtype=id_dtype).tobytes()))
        next_id += n
        mass_parts = [
            np.ascontiguousarray(masses[t][s], dtype=dt).tobytes() for t, s in sorted(part.items()) if mt[t] == 0.0
        ]
        if mass_parts:
            blocks.append(("MASS", b"".join(mass_parts)))
        with atomic_file(path) as tmp:
            with open(tmp, "wb") as f:
                for label, payload in blocks:
                    if labelled:
                        announce = struct.pack(byteorder + "I", len(payload) + 8)
                        f.write(_framed(byteorder, label.encode("ascii") + announce))
                    f.write(_framed(byteorder, payload))
