"""The full-sky configuration end to end through Snakemake, its reruns, and its bad input."""

from __future__ import annotations

import copy
import json
import subprocess
import sys
from pathlib import Path

import h5py
import healpy as hp
import numpy as np
import pytest
import yaml

from raytrace import config as rc
from raytrace.errors import RaytraceError

from workflow_helpers import check_jobs_within_requests, planned_jobs, snakemake

ROOT = Path(__file__).resolve().parents[1]
SPHERE = yaml.safe_load((ROOT / "config" / "sphere_small.yaml").read_text())


def tiny_sphere_config() -> dict:
    cfg = copy.deepcopy(SPHERE)
    cfg["output"] = "results"
    cfg["suite"]["models"] = {"fiducial": {}, "m_nu_zero": {"m_nu_eV": 0.0}}
    cfg["forecast"]["parameters"] = {"m_nu_eV": ["m_nu_zero"]}  # one-sided
    cfg["maps"]["nside"] = 32  # seconds per job
    cfg["suite"]["snapshot_redshifts"] = [0.0, 0.5]  # shells to z = 0.5
    cfg["maps"]["source_redshifts"] = [0.5]
    cfg["survey"]["sources"]["z_max"] = 0.5
    cfg["shells"]["thickness_mpc_h"] = 256
    cfg["statistics"]["power_spectrum"].update(ell_min=8, ell_max=64, bins=4)
    cfg["survey"]["smoothing"]["scales_arcmin"] = [120.0, 240.0]
    cfg["forecast"]["scale_cuts"] = {"peaks": {"smoothing_arcmin": [120.0]}}
    return cfg


@pytest.fixture(scope="module")
def sphere_run(tmp_path_factory):
    work = tmp_path_factory.mktemp("sky_workflow")
    cfg = tiny_sphere_config()
    proc = snakemake(work, cfg)
    assert proc.returncode == 0, proc.stderr[-3000:]
    return work, cfg


def test_sphere_outputs(sphere_run):
    work, cfg = sphere_run
    npix = hp.nside2npix(cfg["maps"]["nside"])
    with h5py.File(work / "results/shells/fiducial/r0000.h5") as f:
        assert f["delta"].shape[1] == npix and f.attrs["kind"] == "tile"
        assert f["rotation"].shape == (f["delta"].shape[0], 3, 3)
    with h5py.File(work / "results/maps/fiducial/r0000.h5") as f:
        assert f.attrs["geometry"] == "sphere" and f.attrs["method"] == "multi-plane"
        assert f["kappa"].shape == (1, npix) and "cmb" in f and "bins" in f
        for label, c in json.loads(f.attrs["shear_consistency"]).items():
            assert c["b_over_e"] < 1e-3, label
    with h5py.File(work / "results/statistics/fiducial/r0000.h5") as f:
        assert f["power_spectrum/unsmoothed/values"].shape == (10, 4)  # 4 maps: 4 autos, 6 crosses
        assert np.all(np.isfinite(f["peaks/smoothing_120arcmin/values"][...]))
    assert hp.read_map(work / "results/fits/fiducial/r0000_kappa.fits", field=None).shape == (4, npix)
    with h5py.File(work / "results/stacks/fiducial.h5") as f:
        assert f["values"].shape[0] == 20
    rows = (work / "results/forecast/errors.csv").read_text().splitlines()
    assert [r.split(",")[1] for r in rows[1:]] == ["power_spectrum", "peaks", "power_spectrum+peaks"]
    assert (work / "results/report/maps.png").stat().st_size > 1000
    log = (work / "logs/trace_sphere/fiducial_b000.log").read_text()
    assert "B/E power" in log and "peak memory" in log


def test_sphere_jobs_fit_in_what_they_ask_for(sphere_run):
    # the shells and trace_sphere estimates (raytrace/resources.py), as for the flat rules
    work, cfg = sphere_run
    seen = check_jobs_within_requests(work, rc.validate(copy.deepcopy(cfg)))
    assert {"shells", "trace_sphere", "observe", "measure"} <= seen


def test_sphere_second_run_does_nothing(sphere_run):
    work, cfg = sphere_run
    assert planned_jobs(snakemake(work, cfg, "-n")) == {}


def test_changing_nside_reruns_shells_onward(sphere_run):
    work, cfg = sphere_run
    changed = copy.deepcopy(cfg)
    changed["maps"]["nside"] = 64
    jobs = planned_jobs(snakemake(work, changed, "-n"))
    assert "simulate" not in jobs
    assert jobs["shells"] == 3 and jobs["trace_sphere"] == 3 and jobs["observe"] == 3, jobs


# ------------------------------------------------------------------------------------
@pytest.mark.parametrize(
    "edit, expected",
    [
        (lambda c: c["maps"].update(nside=100), "maps.nside"),
        (lambda c: c["survey"]["mask"].update(stripes={"width_arcmin": 1, "spacing_arcmin": 10}), "survey.mask.stripes"),
        (lambda c: c["statistics"].update(minkowski={}), "statistics.minkowski"),
        (lambda c: c["shells"].update(kind="lightcone"), "shells.files"),
        (lambda c: c["shells"].update(thickness_mpc_h=1000), "shells.thickness_mpc_h"),
        (lambda c: c["statistics"]["power_spectrum"].update(ell_max=1000), "statistics.power_spectrum.ell_max"),
        (lambda c: c["survey"].update(catalog={"enabled": True}), "survey.catalog.enabled"),
        (lambda c: c["maps"].update(geometry="flat"), "maps.cmb_lensing"),
        (lambda c: c["survey"].update(systematics={"shear_bias": {"m": 0.01}}), "survey.systematics"),
        (lambda c: c.update(suite={"kind": "files", "fiducial": c["suite"]["fiducial"],
                                   "models": {m: {"snapshots": "x/*.hdf5"} for m in c["suite"]["models"]}}),
         "shells.kind"),
    ],
)
def test_sphere_config_errors_name_the_key(edit, expected):
    cfg = copy.deepcopy(SPHERE)
    edit(cfg)
    with pytest.raises(RaytraceError) as info:
        rc.validate(cfg)
    message = str(info.value)
    assert message.startswith(expected) and "\n" not in message, message


def test_flat_config_rejects_sphere_keys():
    cfg = yaml.safe_load((ROOT / "config" / "small.yaml").read_text())
    cfg["maps"]["cmb_lensing"] = True
    with pytest.raises(RaytraceError, match=r"^maps.cmb_lensing: available with maps.geometry: sphere only"):
        rc.validate(cfg)


def run(*args, cwd=None):
    return subprocess.run([sys.executable, "-m", "raytrace", *args], capture_output=True, text=True, cwd=cwd)


def test_bad_light_cone_and_shells_files_give_one_line(tmp_path):
    # bad input: one error line naming the file, exit status 2, no output file
    cfg = rc.validate(copy.deepcopy(SPHERE))
    from raytrace.sky.config import shells_settings

    params = rc.model_parameters(cfg, "fiducial")
    bad = tmp_path / "lc.h5"
    with h5py.File(bad, "w") as f:
        f["Coordinates"] = np.zeros((4, 3))
        f["Masses"] = np.ones(4)
        f.attrs["Omega0"] = params["Omega_m"]  # chi_max_mpc_h missing
    settings = shells_settings({**cfg, "shells": {**cfg["shells"], "kind": "lightcone", "files": str(bad)}}, params)
    out = tmp_path / "shells.h5"
    proc = run("shells", "--model", "fiducial", "--realization", "0", "--settings", json.dumps(settings),
               "--input", str(bad), "--output", str(out))
    lines = [line for line in proc.stderr.splitlines() if line.strip()]
    assert proc.returncode == 2 and len(lines) == 1, proc.stderr
    assert str(bad) in lines[0] and "chi_max_mpc_h" in lines[0]
    assert not out.exists() and not Path(str(out) + ".tmp").exists()
    # a source beyond the shells of a (valid) shell file
    shells = tmp_path / "user_shells.h5"
    with h5py.File(shells, "w") as f:
        f["delta"] = np.zeros((2, hp.nside2npix(8)))
        f["chi_lo_mpc_h"] = [0.0, 100.0]
        f["chi_hi_mpc_h"] = [100.0, 200.0]
    trace = {"cosmology": params, "maps": {**cfg["maps"], "nside": 8}, "sources": None, "seed": 1}
    maps = tmp_path / "maps.h5"
    proc = run("trace-sphere", "--model", "fiducial", "--realization", "0", "--settings", json.dumps(trace),
               "--shells", str(shells), "--output", str(maps))
    lines = [line for line in proc.stderr.splitlines() if line.strip()]
    assert proc.returncode == 2 and len(lines) == 1, proc.stderr
    assert str(shells) in lines[0] and "beyond the last shell" in lines[0]
    assert not maps.exists()
