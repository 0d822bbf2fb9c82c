"""User suites from files (suite.kind: files): discovery, the checks on it, and the workflow."""

from __future__ import annotations

import copy
import os
import subprocess
import sys
from pathlib import Path

import h5py
import numpy as np
import pytest
import yaml

from raytrace import config as rc
from raytrace.cosmology import Cosmology
from raytrace.demo import generate_model
from raytrace.errors import RaytraceError
from raytrace.filesuite import discover, expand_pattern
from raytrace.snapshots.hdf5 import write_snapshot

from conftest import FIDUCIAL

ROOT = Path(__file__).resolve().parents[1]


def files_config(models: dict, **planes) -> dict:
    return {
        "output": "results",
        "seed": 3,
        "suite": {"kind": "files", "fiducial": dict(FIDUCIAL), "models": models},
        "planes": {"thickness_mpc_h": 32.0, "grid": 32, **planes},
        "maps": {"field_deg": 1.0, "pixels": 16, "source_redshifts": [0.5], "realizations": 1},
        "statistics": {"power_spectrum": {"bins": 4}},
    }


@pytest.fixture(scope="module")
def sims(tmp_path_factory):
    """The same tiny demo model (16^3 cold + 16^3 neutrino particles, z = 0 and 0.5, two files
    per snapshot) written as HDF5 and as legacy binary."""
    root = tmp_path_factory.mktemp("sims")
    cosmo = Cosmology(**FIDUCIAL)
    kw = dict(box_mpc_h=64.0, particles_per_side=16, snapshot_redshifts=[0.5, 0.0], seed=5, neutrino_particles=True)
    generate_model(cosmo, directory=root / "h5", **kw)
    generate_model(cosmo, directory=root / "lb", fmt="legacy-binary", **kw)
    return root


def test_discovery_groups_files_by_header(sims, monkeypatch):
    monkeypatch.chdir(sims)
    cfg = rc.validate(files_config({
        "a": {"snapshots": "h5/snap_{index}.*.hdf5", "species": [1, 2]},
        "b": {"snapshots": str(sims / "lb" / "*"), "length_unit": "Mpc/h"},
        "c": {"snapshots": "**/snap_*.hdf5", "format": "hdf5", "m_nu_eV": 0.1},
    }))
    suite = discover(cfg)
    assert suite.box_mpc_h == 64.0
    for name, fmt in (("a", "hdf5"), ("b", "legacy-binary"), ("c", "hdf5")):
        snaps = suite.models[name]
        assert [s.redshift for s in snaps] == [0.0, 0.5]  # increasing redshift, from the headers
        assert all(s.fmt == fmt for s in snaps)
        assert [Path(f).name for f in snaps[1].files][0].startswith("snap_001.0")  # file-number order
        assert len(snaps[0].files) == 2
        assert suite.indices(name) == ["000", "001"]
    assert cfg["suite"]["models"]["b"].get("species") is None and rc.model_species(cfg, "b") == [1]
    assert rc.model_species(cfg, "a") == [1, 2]


def test_index_pattern_keeps_one_index_per_path(tmp_path):
    for name in ("s_007/snap_007.0", "s_007/snap_008.0", "s_008/snap_008.0"):
        (tmp_path / name).parent.mkdir(exist_ok=True)
        (tmp_path / name).write_bytes(b"")
    got = expand_pattern(str(tmp_path / "s_{index}" / "snap_{index}.*"), "k")
    assert sorted(p.relative_to(tmp_path).as_posix() for p in got) == ["s_007/snap_007.0", "s_008/snap_008.0"]


def expect_error(cfg, match, cwd):
    old = os.getcwd()
    os.chdir(cwd)
    try:
        with pytest.raises(RaytraceError) as exc:
            discover(rc.validate(cfg))
    finally:
        os.chdir(old)
    msg = str(exc.value)
    assert match in msg, msg
    assert "\n" not in msg
    return msg


def test_pattern_matching_nothing(sims):
    msg = expect_error(files_config({"a": {"snapshots": "nowhere/*.hdf5"}}), "suite.models.a.snapshots: pattern", sims)
    assert "matches no file" in msg


def test_a_file_that_is_no_snapshot(sims, tmp_path):
    (tmp_path / "snap_000.0.hdf5").symlink_to(sims / "h5" / "snap_000.0.hdf5")
    (tmp_path / "notes.txt").write_text("not particles\n" * 10)
    msg = expect_error(files_config({"a": {"snapshots": "*"}}), "suite.models.a.snapshots:", tmp_path)
    assert "notes.txt: neither an HDF5 file nor a legacy binary snapshot" in msg


def test_mixed_formats(sims):
    msg = expect_error(files_config({"a": {"snapshots": "*/snap_000.*", "length_unit": "Mpc/h"}}),
                       "suite.models.a.snapshots: the pattern mixes formats", sims)
    assert "hdf5" in msg and "legacy-binary" in msg


def test_format_that_does_not_match_the_files(sims):
    expect_error(files_config({"a": {"snapshots": "lb/*", "format": "hdf5"}}),
                 "suite.models.a.format: hdf5 but", sims)


def test_legacy_needs_a_length_unit(sims):
    expect_error(files_config({"a": {"snapshots": "lb/*"}}), "suite.models.a.length_unit: required", sims)


def test_missing_file_of_a_snapshot(sims, tmp_path):
    for f in (sims / "h5").glob("*"):
        if f.name != "snap_001.1.hdf5":
            (tmp_path / f.name).symlink_to(f)
    msg = expect_error(files_config({"a": {"snapshots": "*.hdf5"}}), "suite.models.a.snapshots:", tmp_path)
    assert "NumFilesPerSnapshot is 2 but 1" in msg and "missing: snap_001.1.hdf5" in msg


def test_headers_that_disagree(tmp_path):
    # two files with the same redshift but different particle totals
    rng = np.random.default_rng(0)
    kw = dict(box_mpc_h=64.0, redshift=0.5, omega_m=0.3, omega_lambda=0.7, h=0.7)
    write_snapshot([tmp_path / "x.0.hdf5", tmp_path / "x.1.hdf5"], {1: rng.uniform(0, 64, (100, 3))}, {1: 1.0}, **kw)
    write_snapshot([tmp_path / "y.0.hdf5", tmp_path / "y.1.hdf5"], {1: rng.uniform(0, 64, (120, 3))}, {1: 1.0}, **kw)
    (tmp_path / "y.0.hdf5").unlink()
    (tmp_path / "x.1.hdf5").unlink()
    msg = expect_error(files_config({"a": {"snapshots": "*.hdf5"}}), "suite.models.a.snapshots:", tmp_path)
    assert "y.1.hdf5: Header NumPart_Total is" in msg and "in x.0.hdf5" in msg, msg


def test_index_and_header_disagree(tmp_path):
    rng = np.random.default_rng(0)
    kw = dict(box_mpc_h=64.0, omega_m=0.3, omega_lambda=0.7, h=0.7)
    pos = {1: rng.uniform(0, 64, (100, 3))}
    write_snapshot([tmp_path / "snap_000.hdf5"], pos, {1: 1.0}, redshift=0.0, **kw)
    write_snapshot([tmp_path / "snap_001.hdf5"], pos, {1: 1.0}, redshift=0.0, **kw)
    expect_error(files_config({"a": {"snapshots": "snap_{index}.hdf5"}}), "have the same redshift 0", tmp_path)


def test_box_must_agree_between_models(sims, tmp_path):
    rng = np.random.default_rng(0)
    write_snapshot([tmp_path / "big.hdf5"], {1: rng.uniform(0, 128, (100, 3))}, {1: 1.0}, box_mpc_h=128.0,
                   redshift=1.0, omega_m=0.3, omega_lambda=0.7, h=0.7)
    msg = expect_error(files_config({"a": {"snapshots": str(sims / "h5" / "*")}, "b": {"snapshots": "big.hdf5"}}),
                       "suite.models.b.snapshots:", tmp_path)
    assert "box side of 128 Mpc/h" in msg and "every snapshot of a suite shares one box" in msg


def test_species_the_snapshots_lack(sims):
    expect_error(files_config({"a": {"snapshots": "h5/*", "species": [1, 4]}}),
                 "suite.models.a.species: snapshot", sims)


def test_thickness_and_sources_checked_against_the_headers(sims):
    expect_error(files_config({"a": {"snapshots": "h5/*"}}, thickness_mpc_h=48.0),
                 "planes.thickness_mpc_h: 48.0 does not divide the snapshots' box side 64", sims)
    cfg = files_config({"a": {"snapshots": "h5/*"}})
    cfg["maps"]["source_redshifts"] = [0.5, 0.8]
    expect_error(cfg, "maps.source_redshifts: source at z = 0.8 lies beyond the last lens plane", sims)
    cfg = files_config({"a": {"snapshots": "h5/*"}})
    cfg["survey"] = {"sources": {"nz": {"kind": "smail", "z0": 0.3, "alpha": 2.0, "beta": 1.5}}}
    old = os.getcwd()
    os.chdir(sims)
    try:
        checked = rc.validate(cfg)
        discover(checked)
    finally:
        os.chdir(old)
    assert checked["survey"]["sources"]["z_max"] == 0.5  # the highest snapshot redshift


@pytest.mark.parametrize(
    "edit, message",
    [
        (lambda c: c["suite"].__setitem__("box_mpc_h", 64), "suite.box_mpc_h: only for suite.kind: demo"),
        (lambda c: c["suite"].__setitem__("snapshot_redshifts", [0.0]), "suite.snapshot_redshifts: only for"),
        (lambda c: c["suite"]["models"]["a"].pop("snapshots"), "suite.models.a.snapshots: required key is missing"),
        (lambda c: c["suite"]["models"]["a"].__setitem__("format", "gadget"), "suite.models.a.format"),
        (lambda c: c["suite"]["models"]["a"].__setitem__("length_unit", "pc"), "suite.models.a.length_unit"),
        (lambda c: c["suite"]["models"]["a"].__setitem__("species", [1, 1]), "suite.models.a.species"),
        (lambda c: c["suite"]["models"]["a"].__setitem__("Omega_m", 2.0), "suite.models.a.Omega_m"),
        (lambda c: c["planes"].__setitem__("mpi_tasks", 0), "planes.mpi_tasks"),
    ],
)
def test_files_config_errors_name_the_key(edit, message):
    cfg = files_config({"a": {"snapshots": "x/*"}})
    edit(cfg)
    with pytest.raises(RaytraceError, match=message.replace(".", r"\.")):
        rc.validate(cfg)


def test_demo_config_rejects_file_keys_and_foreign_species():
    cfg = yaml.safe_load((ROOT / "config" / "small.yaml").read_text())
    bad = copy.deepcopy(cfg)
    bad["suite"]["models"]["fiducial"] = {"snapshots": "x/*"}
    with pytest.raises(RaytraceError, match=r"suite\.models\.fiducial\.snapshots: only for suite\.kind: files"):
        rc.validate(bad)
    bad = copy.deepcopy(cfg)
    bad["planes"]["species"] = [1, 2]
    with pytest.raises(RaytraceError, match=r"planes\.species: .*suite\.neutrino_particles: true"):
        rc.validate(bad)
    good = copy.deepcopy(cfg)
    good["planes"]["species"] = [1, 2]
    good["suite"]["neutrino_particles"] = True
    checked = rc.validate(good)
    assert rc.model_species(checked, "fiducial") == [1, 2]
    assert rc.model_species(checked, "m_nu_zero") == [1]  # massless: no neutrino particles


# --------------------------------------------------------------------------- the workflow


def snakemake(workdir: Path, cfg: dict, *extra: str, targets=()) -> subprocess.CompletedProcess:
    path = workdir / "config.yaml"
    path.write_text(yaml.safe_dump(cfg))
    return subprocess.run(
        [sys.executable, "-m", "snakemake", *targets, "-s", str(ROOT / "Snakefile"), "-d", str(workdir),
         "--profile", str(ROOT / "profiles" / "laptop"), "--cores", "2", *extra, "--configfile", str(path)],
        capture_output=True, text=True,
    )


@pytest.fixture(scope="module")
def file_suite_run(sims):
    # The two copies of one model as a two-model files suite, sliced with 2 MPI ranks per job
    # (planes.mpi_tasks), then one model traced: the targets are the plane files and one map.
    work = sims
    cfg = files_config({
        "from_hdf5": {"snapshots": "h5/snap_{index}.*.hdf5", "species": [1, 2]},
        "from_legacy": {"snapshots": "lb/snap_*", "format": "legacy-binary", "length_unit": "Mpc/h",
                        "species": [1, 2]},
    }, mpi_tasks=2)
    targets = [f"results/planes/{m}/snap_{i}.h5" for m in ("from_hdf5", "from_legacy") for i in ("000", "001")]
    targets.append("results/maps/from_hdf5/r0000.h5")
    proc = snakemake(work, cfg, "-p", targets=targets)
    assert proc.returncode == 0, proc.stderr[-3000:]
    return work, cfg, targets, proc


def test_workflow_slices_every_discovered_snapshot(file_suite_run):
    work, _, _, proc = file_suite_run
    text = proc.stdout + proc.stderr
    assert "rule simulate" not in text  # a files suite is never simulated
    assert not (work / "results" / "snapshots").exists()
    for model in ("from_hdf5", "from_legacy"):
        for i, z in (("000", 0.0), ("001", 0.5)):
            with h5py.File(work / f"results/planes/{model}/snap_{i}.h5") as f:
                assert f.attrs["redshift"] == z  # from the headers, in increasing order
                assert f.attrs["deposited_fraction"] == pytest.approx(1.0, rel=1e-9)  # cold + neutrinos
        log = (work / f"logs/slice/{model}_001.log").read_text()
        assert "2 MPI ranks" in log
    with h5py.File(work / "results/maps/from_hdf5/r0000.h5") as f:
        assert f["kappa"].shape == (1, 16, 16)
        assert np.std(f["kappa"][...]) > 0


def test_workflow_planes_equal_across_formats(file_suite_run):
    # The same particles in the two formats give bit-identical planes through the workflow.
    work = file_suite_run[0]
    for i in ("000", "001"):
        with h5py.File(work / f"results/planes/from_hdf5/snap_{i}.h5") as a, \
                h5py.File(work / f"results/planes/from_legacy/snap_{i}.h5") as b:
            for key in ("delta", "dphi_dx", "dphi_dy", "d2phi_dxx", "d2phi_dyy", "d2phi_dxy"):
                np.testing.assert_array_equal(a[key][...], b[key][...])


def test_workflow_second_run_does_nothing_and_launches_mpi(file_suite_run):
    work, cfg, targets, first = file_suite_run
    # the slicing jobs ran under the MPI launcher with the declared task count
    text = first.stdout + first.stderr
    assert "mpiexec -n 2" in text and "tasks=2" in text, text[-2000:]
    proc = snakemake(work, cfg, "-n", targets=targets)
    assert "Nothing to be done" in proc.stdout + proc.stderr


def test_workflow_rejects_a_pattern_matching_nothing(sims, tmp_path):
    cfg = files_config({"a": {"snapshots": str(sims / "nothing_*.hdf5")}})
    proc = snakemake(tmp_path, cfg, "-n")
    assert proc.returncode != 0
    lines = [line for line in (proc.stdout + proc.stderr).splitlines() if "raytrace:" in line]
    assert len(lines) == 1 and "suite.models.a.snapshots: pattern" in lines[0] and "matches no file" in lines[0]
    assert not (tmp_path / "results").exists()


def test_demo_with_neutrino_particles_plans_species_per_model(tmp_path):
    # A demo suite with neutrino particles deposits species 1 and 2, except for the massless
    # model, which has no neutrino particles (dry run: the planned slicing commands).
    cfg = yaml.safe_load((ROOT / "config" / "small.yaml").read_text())
    cfg["suite"]["neutrino_particles"] = True
    cfg["suite"]["models"] = {"fiducial": {}, "m_nu_zero": {"m_nu_eV": 0.0}}
    cfg["planes"]["species"] = [1, 2]
    del cfg["forecast"]  # the slicing plan only
    proc = snakemake(tmp_path, cfg, "-n", "-p")
    text = proc.stdout + proc.stderr
    assert proc.returncode == 0, text[-2000:]
    slices = [line for line in text.splitlines() if " slice --settings " in line]
    assert len(slices) == 6
    fid = [line for line in slices if "planes/fiducial/" in line]
    zero = [line for line in slices if "planes/m_nu_zero/" in line]
    assert all('"species": [1, 2]' in line for line in fid) and len(fid) == 3
    assert all('"species": [1]' in line for line in zero) and len(zero) == 3
    assert all("mpiexec" not in line for line in slices)  # planes.mpi_tasks 1: no launcher
    assert '"neutrino_particles": true' in text  # passed to the simulate jobs


def test_validate_command_reads_the_headers(sims, tmp_path):
    # `raytrace validate` checks a files suite's snapshots too: one line naming the key on error
    good, bad = tmp_path / "good.yaml", tmp_path / "bad.yaml"
    good.write_text(yaml.safe_dump(files_config({"a": {"snapshots": str(sims / "h5" / "*.hdf5")}})))
    bad.write_text(yaml.safe_dump(files_config({"a": {"snapshots": str(sims / "h5" / "*.hdf5"), "species": [3]}})))
    run = lambda p: subprocess.run([sys.executable, "-m", "raytrace", "validate", str(p)],  # noqa: E731
                                   capture_output=True, text=True, cwd=ROOT)
    ok = run(good)
    assert ok.returncode == 0 and "valid (snapshots a: 2; box 64 Mpc/h)" in ok.stdout, ok.stdout + ok.stderr
    no = run(bad)
    lines = [line for line in no.stderr.splitlines() if line.strip()]
    assert no.returncode == 2 and len(lines) == 1 and "suite.models.a.species: snapshot" in lines[0], no.stderr
