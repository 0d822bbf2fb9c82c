"""Tests of the legacy binary snapshot reader and writer.

Reference for the hand-built files: the published format description of the legacy
binary snapshot layout (Fortran unformatted sequential records, 256-byte header,
blocks POS, VEL, ID, MASS; block-labelled variant with 8-byte label records); field
offsets from memory, written here byte by byte with ``struct`` independently of the
reader's own header format string:

    0 npart[6] int32 | 24 mass[6] float64 | 72 time | 80 redshift | 88 flag_sfr |
    92 flag_feedback | 96 npartTotal[6] uint32 | 120 flag_cooling | 124 num_files |
    128 BoxSize | 136 Omega0 | 144 OmegaLambda | 152 HubbleParam | 160 flag_stellarage |
    164 flag_metals | 168 npartTotalHighWord[6] uint32 | 192 flag_entropy_instead_u |
    196..255 padding
"""

from __future__ import annotations

import struct
from pathlib import Path

import numpy as np
import pytest

from raytrace.errors import RaytraceError
from raytrace.snapshots import SnapshotHeader, detect_format
from raytrace.snapshots import iter_chunks as pkg_iter_chunks
from raytrace.snapshots import read_header as pkg_read_header
from raytrace.snapshots import legacy_binary as lb
from raytrace.snapshots.hdf5 import read_header as h5_read_header
from raytrace.snapshots.hdf5 import iter_chunks as h5_iter_chunks
from raytrace.snapshots.hdf5 import write_snapshot

BOX = 100.0
Z = 0.5
OM, OL, H = 0.3, 0.7, 0.7


# --------------------------------------------------------------------------- hand-built files


def header_bytes(bo, npart, mass, *, n_total=None, high=(0,) * 6, num_files=1, box=BOX, z=Z):
    """The 256-byte header, field by field at the offsets of the published layout."""
    n_total = npart if n_total is None else n_total
    buf = bytearray(256)
    for t in range(6):
        struct.pack_into(bo + "i", buf, 0 + 4 * t, npart[t])
        struct.pack_into(bo + "d", buf, 24 + 8 * t, mass[t])
        struct.pack_into(bo + "I", buf, 96 + 4 * t, n_total[t] & 0xFFFFFFFF)
        struct.pack_into(bo + "I", buf, 168 + 4 * t, high[t])
    struct.pack_into(bo + "d", buf, 72, 1.0 / (1.0 + z))
    struct.pack_into(bo + "d", buf, 80, z)
    struct.pack_into(bo + "i", buf, 88, 0)  # flag_sfr
    struct.pack_into(bo + "i", buf, 92, 0)  # flag_feedback
    struct.pack_into(bo + "i", buf, 120, 0)  # flag_cooling
    struct.pack_into(bo + "i", buf, 124, num_files)
    struct.pack_into(bo + "d", buf, 128, box)
    struct.pack_into(bo + "d", buf, 136, OM)
    struct.pack_into(bo + "d", buf, 144, OL)
    struct.pack_into(bo + "d", buf, 152, H)
    struct.pack_into(bo + "i", buf, 160, 0)  # flag_stellarage
    struct.pack_into(bo + "i", buf, 164, 0)  # flag_metals
    struct.pack_into(bo + "i", buf, 192, 0)  # flag_entropy_instead_u
    return bytes(buf)


def record(bo, payload):
    marker = struct.pack(bo + "i", len(payload))
    return marker + payload + marker


def assemble(bo, blocks, labelled):
    """Concatenate (label, payload) blocks as framed records."""
    out = b""
    for label, payload in blocks:
        if labelled:
            out += record(bo, label.encode("ascii") + struct.pack(bo + "i", len(payload) + 8))
        out += record(bo, payload)
    return out


def particle_blocks(bo, dtype, npart, mass, pos, masses, **hkw):
    """HEAD, POS, VEL, ID and (when needed) MASS blocks for particles ``pos[t]``."""
    fdt = np.dtype(dtype).newbyteorder(bo)
    n = sum(npart)
    pos_bytes = b"".join(np.asarray(pos[t], dtype=fdt).tobytes() for t in range(6) if npart[t])
    blocks = [
        ("HEAD", header_bytes(bo, npart, mass, **hkw)),
        ("POS ", pos_bytes),
        ("VEL ", np.ones(3 * n, dtype=fdt).tobytes()),
        ("ID  ", np.arange(n, dtype=bo + "i4").tobytes()),
    ]
    mass_bytes = b"".join(
        np.asarray(masses[t], dtype=fdt).tobytes() for t in range(6) if npart[t] and mass[t] == 0.0
    )
    if mass_bytes:
        blocks.append(("MASS", mass_bytes))
    return blocks


def two_species(rng, n1=5, n4=3):
    """Type 1 with a mass table entry, type 4 with per-particle masses."""
    npart = [0, n1, 0, 0, n4, 0]
    mass = [0.0, 0.25, 0.0, 0.0, 0.0, 0.0]
    pos = {1: rng.uniform(0, BOX, (n1, 3)), 4: rng.uniform(0, BOX, (n4, 3))}
    masses = {4: rng.uniform(0.01, 0.02, n4)}
    return npart, mass, pos, masses


def write_hand(path, bo="<", dtype=np.float32, labelled=False, npart=None, mass=None, pos=None, masses=None, **hkw):
    path.write_bytes(assemble(bo, particle_blocks(bo, dtype, npart, mass, pos, masses, **hkw), labelled))
    return path


def read_all(files, length_unit="Mpc/h", species=(1, 4), chunk_size=2):
    header = lb.read_header([Path(f) for f in files], length_unit)
    return header, list(lb.iter_chunks(header, list(species), chunk_size))


def joined(chunks, t):
    got = [c for c in chunks if c.species == t]
    return np.concatenate([c.positions for c in got]), np.concatenate([c.masses for c in got])


def f32(x, dtype):
    return np.asarray(x).astype(dtype).astype(np.float64)


# --------------------------------------------------------------------------- reading hand-built files


@pytest.mark.parametrize("labelled", [False, True], ids=["plain", "labelled"])
@pytest.mark.parametrize("bo", ["<", ">"], ids=["little", "big"])
@pytest.mark.parametrize("dtype", [np.float32, np.float64], ids=["f4", "f8"])
def test_hand_built_single_file(tmp_path, labelled, bo, dtype):
    rng = np.random.default_rng(1)
    npart, mass, pos, masses = two_species(rng)
    path = write_hand(tmp_path / "snap_010", bo, dtype, labelled, npart, mass, pos, masses)

    header, chunks = read_all([path])
    assert header.box_mpc_h == BOX
    assert header.redshift == Z
    assert (header.omega_m, header.omega_lambda, header.h) == (OM, OL, H)
    assert header.n_total == {1: 5, 4: 3}
    assert header.mass_table == {0: 0.0, 1: 0.25, 2: 0.0, 3: 0.0, 4: 0.0, 5: 0.0}
    assert header.n_per_file == [{1: 5, 4: 3}]
    assert header.files == [path]

    assert [c.species for c in chunks] == [1, 1, 1, 4, 4]
    assert all(len(c.positions) <= 2 and c.positions.dtype == np.float64 for c in chunks)
    p1, m1 = joined(chunks, 1)
    p4, m4 = joined(chunks, 4)
    np.testing.assert_array_equal(p1, f32(pos[1], dtype))
    np.testing.assert_array_equal(m1, np.full(5, 0.25))
    np.testing.assert_array_equal(p4, f32(pos[4], dtype))
    np.testing.assert_array_equal(m4, f32(masses[4], dtype))


def test_package_entry_points(tmp_path):
    rng = np.random.default_rng(2)
    npart, mass, pos, masses = two_species(rng)
    path = write_hand(tmp_path / "snap", "<", np.float32, False, npart, mass, pos, masses)
    header = pkg_read_header([str(path)], fmt="legacy-binary", length_unit="Mpc/h")
    chunks = list(pkg_iter_chunks(header, [4], fmt="legacy-binary", chunk_size=10))
    assert len(chunks) == 1
    np.testing.assert_array_equal(chunks[0].positions, f32(pos[4], np.float32))


@pytest.mark.parametrize("labelled", [False, True], ids=["plain", "labelled"])
def test_hand_built_without_mass_block(tmp_path, labelled):
    rng = np.random.default_rng(3)
    npart = [4, 6, 0, 0, 0, 0]
    mass = [0.05, 0.5, 0.0, 0.0, 0.0, 0.0]
    pos = {0: rng.uniform(0, BOX, (4, 3)), 1: rng.uniform(0, BOX, (6, 3))}
    blocks = particle_blocks(">", np.float64, npart, mass, pos, {})
    assert [b[0] for b in blocks] == ["HEAD", "POS ", "VEL ", "ID  "]
    path = tmp_path / "snap"
    path.write_bytes(assemble(">", blocks, labelled))
    header, chunks = read_all([path], species=(0, 1), chunk_size=4)
    assert header.n_total == {0: 4, 1: 6}
    p0, m0 = joined(chunks, 0)
    p1, m1 = joined(chunks, 1)
    np.testing.assert_array_equal(p0, pos[0])
    np.testing.assert_array_equal(p1, pos[1])
    np.testing.assert_array_equal(m0, np.full(4, 0.05))
    np.testing.assert_array_equal(m1, np.full(6, 0.5))


@pytest.mark.parametrize("labelled", [False, True], ids=["plain", "labelled"])
def test_hand_built_mass_block_of_two_types(tmp_path, labelled):
    # types 0 and 4 share the MASS block (type 0 first); type 1 between them uses the mass table
    rng = np.random.default_rng(25)
    npart = [2, 3, 0, 0, 4, 0]
    mass = [0.0, 0.5, 0.0, 0.0, 0.0, 0.0]
    pos = {t: rng.uniform(0, BOX, (n, 3)) for t, n in enumerate(npart) if n}
    masses = {0: np.array([0.1, 0.2]), 4: np.array([0.01, 0.02, 0.03, 0.04])}
    path = write_hand(tmp_path / "snap", "<", np.float64, labelled, npart, mass, pos, masses)
    _, chunks = read_all([path], species=(4, 0, 1), chunk_size=3)
    assert [c.species for c in chunks] == [4, 4, 0, 1]
    for t in (0, 1, 4):
        p, m = joined(chunks, t)
        np.testing.assert_array_equal(p, pos[t])
        np.testing.assert_array_equal(m, masses[t] if t in masses else np.full(3, 0.5))


def test_plain_layout_ignores_records_after_mass(tmp_path):
    # gas blocks (internal energy, density, ...) may follow MASS in the plain layout
    rng = np.random.default_rng(4)
    npart, mass, pos, masses = two_species(rng)
    blocks = particle_blocks("<", np.float32, npart, mass, pos, masses)
    blocks.append(("U   ", np.zeros(7, "<f4").tobytes()))
    path = tmp_path / "snap"
    path.write_bytes(assemble("<", blocks, False))
    _, chunks = read_all([path])
    np.testing.assert_array_equal(joined(chunks, 4)[1], f32(masses[4], np.float32))


@pytest.mark.parametrize("labelled", [False, True], ids=["plain", "labelled"])
def test_hand_built_multi_file(tmp_path, labelled):
    rng = np.random.default_rng(5)
    # type 1 spread 3/2/2, type 4 (per-particle masses) 2/0/1: file 1 holds no type 4
    split1, split4 = [3, 2, 2], [2, 0, 1]
    pos1, pos4 = rng.uniform(0, BOX, (7, 3)), rng.uniform(0, BOX, (3, 3))
    m4 = rng.uniform(0.01, 0.02, 3)
    total = [0, 7, 0, 0, 3, 0]
    mass = [0.0, 0.25, 0.0, 0.0, 0.0, 0.0]
    paths = []
    a1 = a4 = 0
    for i in range(3):
        npart = [0, split1[i], 0, 0, split4[i], 0]
        pos = {1: pos1[a1 : a1 + split1[i]], 4: pos4[a4 : a4 + split4[i]]}
        masses = {4: m4[a4 : a4 + split4[i]]}
        paths.append(
            write_hand(
                tmp_path / f"snap_003.{i}", "<", np.float64, labelled, npart, mass, pos, masses,
                n_total=total, num_files=3,
            )  # fmt: skip
        )
        a1, a4 = a1 + split1[i], a4 + split4[i]
    header, chunks = read_all([paths[2], paths[0], paths[1]], chunk_size=10)
    assert header.files == paths
    assert header.n_total == {1: 7, 4: 3}
    assert header.n_per_file == [{1: 3, 4: 2}, {1: 2}, {1: 2, 4: 1}]
    assert [c.species for c in chunks] == [1, 4, 1, 1, 4]
    p1, _ = joined(chunks, 1)
    p4, mm4 = joined(chunks, 4)
    np.testing.assert_array_equal(p1, pos1)
    np.testing.assert_array_equal(p4, pos4)
    np.testing.assert_array_equal(mm4, m4)


def test_length_unit_kpc(tmp_path):
    rng = np.random.default_rng(6)
    npart, mass, pos, masses = two_species(rng)
    pos_kpc = {t: p * 1000.0 for t, p in pos.items()}
    path = write_hand(tmp_path / "snap", "<", np.float64, False, npart, mass, pos_kpc, masses, box=BOX * 1000.0)
    header, chunks = read_all([path], length_unit="kpc/h")
    assert header.box_mpc_h == pytest.approx(BOX, rel=1e-15)
    assert header.length_to_mpc_h == 1e-3
    np.testing.assert_allclose(joined(chunks, 1)[0], pos[1], rtol=1e-14)


def test_length_unit_required(tmp_path):
    rng = np.random.default_rng(7)
    path = write_hand(tmp_path / "snap_042", "<", np.float32, False, *two_species(rng))
    with pytest.raises(RaytraceError) as exc:
        lb.read_header([path], None)
    assert "length_unit" in str(exc.value) and "snap_042" in str(exc.value)
    with pytest.raises(RaytraceError, match="length_unit: unknown unit 'Gpc'"):
        lb.read_header([path], "Gpc")


def test_high_word_of_total_counts_is_read(tmp_path):
    rng = np.random.default_rng(8)
    npart, mass, pos, masses = two_species(rng)
    path = write_hand(tmp_path / "snap", "<", np.float32, False, npart, mass, pos, masses, high=(0, 1, 0, 0, 0, 0))
    with pytest.raises(RaytraceError) as exc:
        lb.read_header([path], "Mpc/h")
    # 2**32 + 5 particles of type 1 announced, 5 present
    assert f"npartTotal[1] is {2**32 + 5}" in str(exc.value)


def test_rebuilt_plain_header_is_read(tmp_path):
    rng = np.random.default_rng(9)
    npart, mass, pos, masses = two_species(rng)
    path = write_hand(tmp_path / "snap", "<", np.float32, True, npart, mass, pos, masses)
    h = lb.read_header([path], "Mpc/h")
    plain = SnapshotHeader(
        files=h.files,
        box_mpc_h=h.box_mpc_h,
        redshift=h.redshift,
        omega_m=h.omega_m,
        omega_lambda=h.omega_lambda,
        h=h.h,
        n_total=h.n_total,
        mass_table=h.mass_table,
        length_to_mpc_h=h.length_to_mpc_h,
        n_per_file=h.n_per_file,
    )
    a = list(lb.iter_chunks(h, [1, 4], 3))
    b = list(lb.iter_chunks(plain, [1, 4], 3))
    assert len(a) == len(b) == 3
    for ca, cb in zip(a, b):
        assert ca.species == cb.species
        np.testing.assert_array_equal(ca.positions, cb.positions)
        np.testing.assert_array_equal(ca.masses, cb.masses)


def test_reads_are_bounded_by_chunk_size(tmp_path, monkeypatch):
    rng = np.random.default_rng(10)
    npart, mass, pos, masses = two_species(rng, n1=50, n4=20)
    path = write_hand(tmp_path / "snap", "<", np.float32, False, npart, mass, pos, masses)
    counts = []
    real = np.fromfile

    def spy(*args, **kwargs):
        counts.append(kwargs.get("count", -1))
        return real(*args, **kwargs)

    monkeypatch.setattr(np, "fromfile", spy)
    header, chunks = read_all([path], chunk_size=8)
    assert sum(len(c.masses) for c in chunks) == 70
    assert counts and all(0 < c <= 3 * 8 for c in counts)


# --------------------------------------------------------------------------- round trips


@pytest.mark.parametrize("labelled", [False, True], ids=["plain", "labelled"])
@pytest.mark.parametrize("bo", ["<", ">"], ids=["little", "big"])
@pytest.mark.parametrize("dtype", [np.float32, np.float64], ids=["f4", "f8"])
@pytest.mark.parametrize("n_files", [1, 3])
def test_writer_reader_round_trip(tmp_path, labelled, bo, dtype, n_files):
    rng = np.random.default_rng(11)
    pos = {1: rng.uniform(0, BOX, (11, 3)), 2: rng.uniform(0, BOX, (4, 3))}
    masses = {2: rng.uniform(1.0, 2.0, 4)}
    paths = [tmp_path / (f"rt.{i}" if n_files > 1 else "rt") for i in range(n_files)]
    lb.write_snapshot_legacy(
        paths, pos, {1: 0.75}, box=BOX, redshift=Z, omega_m=OM, omega_lambda=OL, h=H,
        labelled=labelled, byteorder=bo, pos_dtype=dtype, masses=masses,
    )  # fmt: skip
    for p in paths:
        assert detect_format(p) == "legacy-binary"
    header, chunks = read_all(paths, species=(1, 2), chunk_size=2)
    assert header.n_total == {1: 11, 2: 4}
    assert header.mass_table[1] == 0.75 and header.mass_table[2] == 0.0
    assert (header.box_mpc_h, header.redshift, header.omega_m, header.omega_lambda, header.h) == (BOX, Z, OM, OL, H)
    assert header.scale_factor == pytest.approx(1 / (1 + Z))
    p1, m1 = joined(chunks, 1)
    p2, m2 = joined(chunks, 2)
    np.testing.assert_array_equal(p1, f32(pos[1], dtype))
    np.testing.assert_array_equal(p2, f32(pos[2], dtype))
    np.testing.assert_array_equal(m1, np.full(11, 0.75))
    np.testing.assert_array_equal(m2, f32(masses[2], dtype))


def test_writer_matches_hand_built_bytes(tmp_path):
    # the writer stores zero velocities and IDs 1, 2, ...; the hand-built file is adjusted to match
    rng = np.random.default_rng(12)
    npart, mass, pos, masses = two_species(rng)
    path = tmp_path / "w"
    lb.write_snapshot_legacy(
        [path], pos, {1: 0.25}, box=BOX, redshift=Z, omega_m=OM, omega_lambda=OL, h=H, labelled=True, masses=masses
    )
    blocks = particle_blocks("<", np.float32, npart, mass, pos, masses)
    blocks[2] = ("VEL ", bytes(len(blocks[2][1])))
    blocks[3] = ("ID  ", np.arange(1, 9, dtype="<i4").tobytes())
    assert path.read_bytes() == assemble("<", blocks, True)


def test_hdf5_and_legacy_give_identical_chunks(tmp_path):
    rng = np.random.default_rng(13)
    pos = {1: rng.uniform(0, BOX, (13, 3)).astype(np.float32), 4: rng.uniform(0, BOX, (5, 3)).astype(np.float32)}
    masses = {4: rng.uniform(0.1, 0.2, 5).astype(np.float32)}
    kw = dict(redshift=Z, omega_m=OM, omega_lambda=OL, h=H, masses=masses)
    h5_paths = [tmp_path / f"h5snap.{i}.hdf5" for i in range(2)]
    lb_paths = [tmp_path / f"lbsnap.{i}" for i in range(2)]
    write_snapshot(h5_paths, pos, {1: 0.25}, box_mpc_h=BOX, **kw)
    lb.write_snapshot_legacy(lb_paths, pos, {1: 0.25}, box=BOX, **kw)
    assert detect_format(h5_paths[0]) == "hdf5"
    assert detect_format(lb_paths[0]) == "legacy-binary"

    h_h5 = h5_read_header(h5_paths, None)
    h_lb = lb.read_header(lb_paths, "Mpc/h")
    for name in ("box_mpc_h", "redshift", "omega_m", "omega_lambda", "h", "n_total", "mass_table", "n_per_file"):
        assert getattr(h_h5, name) == getattr(h_lb, name), name
    c_h5 = list(h5_iter_chunks(h_h5, [1, 4], 3))
    c_lb = list(lb.iter_chunks(h_lb, [1, 4], 3))
    assert len(c_h5) == len(c_lb) > 2
    for a, b in zip(c_h5, c_lb):
        assert a.species == b.species
        assert a.positions.dtype == b.positions.dtype == np.float64
        np.testing.assert_array_equal(a.positions, b.positions)
        np.testing.assert_array_equal(a.masses, b.masses)


# --------------------------------------------------------------------------- errors


def raises_naming(path, files, length_unit="Mpc/h", species=(1, 4), match=None):
    """Reading ``files`` fails with a one-line RaytraceError naming ``path``."""
    with pytest.raises(RaytraceError) as exc:
        header = lb.read_header([Path(f) for f in files], length_unit)
        list(lb.iter_chunks(header, list(species), 4))
    msg = str(exc.value)
    assert str(path) in msg, msg
    assert "\n" not in msg
    if match is not None:
        assert match in msg, msg
    return msg


@pytest.fixture
def good(tmp_path):
    """A plain little-endian float32 file and its byte offsets."""
    rng = np.random.default_rng(14)
    npart, mass, pos, masses = two_species(rng)
    path = write_hand(tmp_path / "snap_005", "<", np.float32, False, npart, mass, pos, masses)
    data = path.read_bytes()
    # records: HEAD 256, POS 8*3*4, VEL 96, ID 32, MASS 12
    offsets, off = [], 0
    while off < len(data):
        (n,) = struct.unpack_from("<i", data, off)
        offsets.append((off, n))
        off += n + 8
    assert [n for _, n in offsets] == [256, 96, 96, 32, 12]
    return path, data, offsets


def test_error_truncated_inside_a_record(good):
    path, data, offsets = good
    pos_off = offsets[1][0]
    path.write_bytes(data[: pos_off + 50])
    raises_naming(path, [path], match=f"truncated: record at offset {pos_off} claims 96 bytes")


def test_error_truncated_after_header_was_read(good):
    # a file cut while the reader streams it (e.g. overwritten by a running job)
    path, data, offsets = good
    header = lb.read_header([path], "Mpc/h")
    path.write_bytes(data[: offsets[1][0] + 4 + 40])
    with pytest.raises(RaytraceError) as exc:
        list(lb.iter_chunks(header, [1], 4))
    assert str(exc.value).startswith(f"{path}: truncated: POS block")


def test_error_truncated_inside_a_marker(good):
    path, data, _ = good
    path.write_bytes(data[:-2])
    raises_naming(path, [path], match="truncated")


def test_error_truncated_at_a_record_boundary(good):
    path, data, offsets = good
    path.write_bytes(data[: offsets[4][0]])  # MASS record dropped
    raises_naming(path, [path], match="block MASS is missing")


def test_error_truncated_before_data(good):
    path, data, _ = good
    path.write_bytes(data[:2])
    raises_naming(path, [path], match="truncated")


def test_error_header_marker_mismatch(tmp_path):
    rng = np.random.default_rng(15)
    npart, mass, pos, masses = two_species(rng)
    paths = [
        write_hand(tmp_path / f"snap_005.{i}", "<", np.float32, False, npart, mass, pos, masses,
                   n_total=[2 * n for n in npart], num_files=2)
        for i in range(2)
    ]  # fmt: skip
    data = bytearray(paths[1].read_bytes())
    struct.pack_into("<i", data, 260, 260)  # closing marker of the header
    paths[1].write_bytes(bytes(data))
    msg = raises_naming(paths[1], paths)
    assert msg == f"{paths[1]}: record marker 260 does not match 256 at offset 0"


def test_error_block_marker_mismatch(good):
    path, data, offsets = good
    off, n = offsets[2]  # VEL
    data = bytearray(data)
    struct.pack_into("<i", data, off + 4 + n, n + 4)
    path.write_bytes(bytes(data))
    raises_naming(path, [path], match=f"record marker {n + 4} does not match {n} at offset {off}")


def test_error_first_marker_not_a_header(tmp_path):
    path = tmp_path / "snap_bad"
    path.write_bytes(record("<", bytes(252)) + bytes(100))
    raises_naming(path, [path], match="neither 256")


def test_error_labelled_header_wrong_size(tmp_path):
    path = tmp_path / "snap_lab"
    path.write_bytes(assemble("<", [("HEAD", bytes(252))], True))
    raises_naming(path, [path], match="header record holds 252 bytes, expected 256")


def test_error_label_announces_wrong_size(tmp_path):
    rng = np.random.default_rng(16)
    npart, mass, pos, masses = two_species(rng)
    blocks = particle_blocks("<", np.float32, npart, mass, pos, masses)
    data = bytearray(assemble("<", blocks, True))
    # the label record before POS sits after HEAD's label (16 bytes) and HEAD (264 bytes)
    assert data[280 + 4 : 280 + 8] == b"POS "
    struct.pack_into("<i", data, 280 + 8, 96 + 8 + 4)
    path = tmp_path / "snap_lab"
    path.write_bytes(bytes(data))
    raises_naming(path, [path], match="announces 100 bytes")


def test_error_npart_does_not_match_pos(tmp_path):
    rng = np.random.default_rng(17)
    npart, mass, pos, masses = two_species(rng)
    blocks = particle_blocks("<", np.float32, npart, mass, pos, masses)
    blocks[0] = ("HEAD", header_bytes("<", [0, 6, 0, 0, 3, 0], mass))  # 6 announced, 5 written
    path = tmp_path / "snap_cnt"
    path.write_bytes(assemble("<", blocks, False))
    raises_naming(path, [path], match="POS record holds 96 bytes")


def test_error_mass_block_does_not_match_counts(tmp_path):
    rng = np.random.default_rng(18)
    npart, mass, pos, masses = two_species(rng)
    blocks = particle_blocks("<", np.float32, npart, mass, pos, masses)
    blocks[4] = ("MASS", blocks[4][1][:-4])
    path = tmp_path / "snap_m"
    path.write_bytes(assemble("<", blocks, True))
    raises_naming(path, [path], match="MASS record holds 8 bytes")


def test_error_totals_do_not_match_files(tmp_path):
    rng = np.random.default_rng(19)
    npart, mass, pos, masses = two_species(rng)
    n_total = [0, 5, 0, 0, 4, 0]  # 4 particles of type 4 announced, 3 written
    path = write_hand(tmp_path / "snap_tot", "<", np.float32, False, npart, mass, pos, masses, n_total=n_total)
    raises_naming(path, [path], match="npartTotal[4] is 4 but the file(s) hold 3")


def test_error_missing_file_of_multi_file_snapshot(tmp_path):
    rng = np.random.default_rng(20)
    npart, mass, pos, masses = two_species(rng)
    paths = [
        write_hand(tmp_path / f"snap_007.{i}", "<", np.float32, False, npart, mass, pos, masses,
                   n_total=[3 * n for n in npart], num_files=3)
        for i in range(2)
    ]  # fmt: skip
    msg = raises_naming(paths[0], paths, match="num_files is 3 but 2 file(s)")
    assert str(tmp_path / "snap_007.2") in msg


def test_error_multi_file_headers_disagree(tmp_path):
    rng = np.random.default_rng(21)
    npart, mass, pos, masses = two_species(rng)
    kw = dict(n_total=[2 * n for n in npart], num_files=2)
    a = write_hand(tmp_path / "s.0", "<", np.float32, False, npart, mass, pos, masses, **kw)
    b = write_hand(tmp_path / "s.1", "<", np.float32, False, npart, mass, pos, masses, box=BOX * 2, **kw)
    raises_naming(b, [a, b], match="header BoxSize is 200.0 but 100.0")


def test_error_nan_position(tmp_path):
    rng = np.random.default_rng(22)
    npart, mass, pos, masses = two_species(rng)
    pos[4][1, 2] = np.nan
    path = write_hand(tmp_path / "snap_nan", "<", np.float32, False, npart, mass, pos, masses)
    raises_naming(path, [path], match="non-finite particle positions in species 4")


def test_error_position_outside_box(tmp_path):
    rng = np.random.default_rng(23)
    npart, mass, pos, masses = two_species(rng)
    pos[1][3, 0] = 1.5 * BOX
    path = write_hand(tmp_path / "snap_out", "<", np.float64, False, npart, mass, pos, masses)
    raises_naming(path, [path], match="outside the box")


def test_error_species_absent(good):
    path, _, _ = good
    raises_naming(path, [path], species=(0,), match="no particles of species 0")


# --------------------------------------------------------------------------- format detection


def test_detect_format(tmp_path):
    rng = np.random.default_rng(24)
    npart, mass, pos, masses = two_species(rng)
    h5 = tmp_path / "snap.hdf5"
    write_snapshot([h5], pos, {1: 0.25}, box_mpc_h=BOX, redshift=Z, omega_m=OM, omega_lambda=OL, h=H, masses=masses)
    assert detect_format(h5) == "hdf5"
    for labelled in (False, True):
        for bo in ("<", ">"):
            p = write_hand(tmp_path / f"lb_{labelled}_{bo == '<'}", bo, np.float32, labelled, npart, mass, pos, masses)
            assert detect_format(str(p)) == "legacy-binary"
    junk = tmp_path / "junk.dat"
    junk.write_bytes(b"this is not a particle snapshot at all" * 40)
    with pytest.raises(RaytraceError, match="junk.dat: neither an HDF5 file nor a legacy binary snapshot"):
        detect_format(junk)
    empty = tmp_path / "empty.dat"
    empty.write_bytes(b"")
    with pytest.raises(RaytraceError, match="empty.dat: neither"):
        detect_format(empty)
    with pytest.raises(RaytraceError, match="absent.dat: cannot read"):
        detect_format(tmp_path / "absent.dat")
