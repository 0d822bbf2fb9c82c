"""Bad input: one line naming the key or file, a non-zero exit, and no half-written output."""

from __future__ import annotations

import copy
import json
import re
import subprocess
import sys
from pathlib import Path

import h5py
import numpy as np
import pytest
import yaml

from raytrace import config as rc
from raytrace.errors import RaytraceError
from raytrace.snapshots.hdf5 import write_snapshot

ROOT = Path(__file__).resolve().parents[1]
SMALL = yaml.safe_load((ROOT / "config" / "small.yaml").read_text())


def run(*args, cwd=None):
    return subprocess.run([sys.executable, "-m", "raytrace", *args], capture_output=True, text=True, cwd=cwd)


def one_error_line(proc) -> str:
    lines = [line for line in proc.stderr.splitlines() if line.strip()]
    assert proc.returncode == 2, proc.stderr
    assert len(lines) == 1, proc.stderr
    return lines[0]


def edited(path_keys, value):
    cfg = copy.deepcopy(SMALL)
    node = cfg
    for key in path_keys[:-1]:
        node = node[key]
    if value is KeyError:
        del node[path_keys[-1]]
    else:
        node[path_keys[-1]] = value
    return cfg


@pytest.mark.parametrize(
    "keys, value, expected",
    [
        (("maps", "pixel_count"), 64, "maps.pixel_count: unknown key"),
        (("maps", "pixels"), "many", "maps.pixels"),
        (("suite", "fiducial", "Omega_m"), 1.5, "suite.fiducial.Omega_m"),
        (("planes", "thickness_mpc_h"), 30, "planes.thickness_mpc_h"),
        (("maps", "source_redshifts"), [0.5, 3.0], "maps.source_redshifts"),
        (("suite", "models", "odd"), {"w0": -0.9}, "suite.models.odd"),
        (("suite", "fiducial", "h"), KeyError, "suite.fiducial"),
        (("statistics", "power_spectrum", "bins"), 0, "statistics.power_spectrum.bins"),
        (("survey", "smoothing", "kernel"), "boxcar", "survey.smoothing.kernel"),
        (("survey", "sources", "z_max"), 2.0, "survey.sources.z_max"),
        (("survey", "noise", "sigma_e"), -0.1, "survey.noise.sigma_e"),
        (("forecast", "fiducial"), "nowhere", "forecast.fiducial: no model 'nowhere'"),
        (("forecast", "parameters", "m_nu_eV"), ["m_nu_zero", "A_s_high"], "forecast.parameters.m_nu_eV: model 'A_s_high' also differs"),
        (("forecast", "parameters", "m_nu_eV"), ["m_nu_high", "m_nu_high"], "forecast.parameters.m_nu_eV: the same model"),
        (("forecast", "parameters", "w0"), ["m_nu_high"], "forecast.parameters.w0: unknown parameter"),
        (("forecast", "parameters", "A_s"), ["ghost"], "forecast.parameters.A_s: no model 'ghost'"),
        (("forecast", "combinations"), [["peaks", "shear_ratio"]], "forecast.combinations[0]: 'shear_ratio'"),
        (("forecast", "maps"), ["bin3"], "forecast.maps: no map 'bin3'"),
        (("maps", "realizations_per_job"), 100, "maps.realizations: 10 realisations of A_s_high are not a multiple"),
        (("forecast", "priors", "sigma"), {"h": 0.1}, "forecast.priors.sigma.h: not a forecast parameter"),
        (("forecast", "priors", "fisher"), "no/such.npy", "forecast.priors.fisher: no/such.npy: file not found"),
        (("maps", "realizations_per_job"), 7, "maps.realizations_per_job"),
        (("report",), {"map": "bin9"}, "report.map: no map 'bin9'"),
    ],
)
def test_config_errors_name_the_key(tmp_path, keys, value, expected):
    path = tmp_path / "bad.yaml"
    path.write_text(yaml.safe_dump(edited(keys, value)))
    with pytest.raises(RaytraceError, match=re.escape(expected)):
        rc.load(path)
    line = one_error_line(run("validate", str(path)))
    assert expected in line  # the key is named on the one line


def test_snakemake_rejects_bad_config_in_one_line(tmp_path):
    path = tmp_path / "bad.yaml"
    path.write_text(yaml.safe_dump(edited(("maps", "pixel_count"), 64)))
    proc = subprocess.run(
        [sys.executable, "-m", "snakemake", "-s", str(ROOT / "Snakefile"), "-d", str(tmp_path), "-n",
         "--configfile", str(path)], capture_output=True, text=True)
    assert proc.returncode != 0
    assert "raytrace: configuration error: maps.pixel_count: unknown key" in proc.stderr + proc.stdout
    assert not (tmp_path / "results").exists()


def small_snapshot(tmp_path, drop_attr=None):
    rng = np.random.default_rng(0)
    files = [tmp_path / f"snap.{i}.hdf5" for i in range(2)]
    write_snapshot(files, {1: rng.uniform(0, 32, (4000, 3)).astype(np.float32)}, {1: 1.0}, box_mpc_h=32.0,
                   redshift=0.0, omega_m=0.3, omega_lambda=0.7, h=0.7)
    if drop_attr:
        with h5py.File(files[1], "a") as f:
            del f["Header"].attrs[drop_attr]
    return files


SLICE = json.dumps({"grid": 16, "thickness_mpc_h": 16.0, "species": [1], "assignment": "cic",
                    "chunk_particles": 1000})


def assert_nothing_written(out: Path):
    assert not out.exists()
    assert not list(out.parent.glob(out.name + ".tmp*"))  # nor a temporary file


def test_missing_snapshot_file(tmp_path):
    files = small_snapshot(tmp_path)
    files[1].unlink()
    out = tmp_path / "planes.h5"
    line = one_error_line(run("slice", "--settings", SLICE, "--snapshot", str(files[0]), str(files[1]),
                              "--output", str(out)))
    assert str(files[1]) in line
    assert_nothing_written(out)


def test_missing_file_of_multifile_snapshot(tmp_path):
    files = small_snapshot(tmp_path)
    out = tmp_path / "planes.h5"
    line = one_error_line(run("slice", "--settings", SLICE, "--snapshot", str(files[0]), "--output", str(out)))
    assert "NumFilesPerSnapshot" in line and str(files[0]) in line
    assert_nothing_written(out)


def test_snapshot_missing_header_attribute(tmp_path):
    files = small_snapshot(tmp_path, drop_attr="Redshift")
    out = tmp_path / "planes.h5"
    line = one_error_line(run("slice", "--settings", SLICE, "--snapshot", *map(str, files), "--output", str(out)))
    assert str(files[1]) in line and "Redshift" in line
    assert_nothing_written(out)


def test_source_beyond_the_planes(tmp_path):
    files = small_snapshot(tmp_path)
    planes = tmp_path / "planes.h5"
    assert run("slice", "--settings", SLICE, "--snapshot", *map(str, files), "--output", str(planes)).returncode == 0
    settings = {"cosmology": SMALL["suite"]["fiducial"], "seed": 1,
                "maps": {"field_deg": 1.0, "pixels": 16, "method": "born", "source_redshifts": [0.5],
                         "randomize_planes": True}}
    out = tmp_path / "maps.h5"
    line = one_error_line(run("trace", "--model", "m", "--realization", "0", "--settings", json.dumps(settings),
                              "--planes", str(planes), "--output", str(out)))
    assert "maps.source_redshifts" in line and "beyond the last lens plane" in line
    assert_nothing_written(out)


def test_failure_while_writing_leaves_no_file(tmp_path):
    # The atomic writer removes its temporary file when the stage fails midway.
    from raytrace.hdf5 import atomic_h5

    out = tmp_path / "x.h5"
    with pytest.raises(RuntimeError):
        with atomic_h5(out, stage="test") as f:
            f.create_dataset("a", data=np.arange(10))
            raise RuntimeError("killed")
    assert_nothing_written(out)


def test_field_wider_than_the_box_warns_in_the_log(tmp_path):
    # Common practice: a light cone wider than the box repeats the same structures across
    # the map; the trace stage says so in its log and still writes the maps.
    rng = np.random.default_rng(0)
    files = [tmp_path / f"snap.{i}.hdf5" for i in range(2)]
    write_snapshot(files, {1: rng.uniform(0, 32, (4000, 3)).astype(np.float32)}, {1: 1.0}, box_mpc_h=32.0,
                   redshift=0.5, omega_m=0.3, omega_lambda=0.7, h=0.7)
    planes = tmp_path / "planes.h5"
    assert run("slice", "--settings", SLICE, "--snapshot", *map(str, files), "--output", str(planes)).returncode == 0
    settings = {"cosmology": SMALL["suite"]["fiducial"], "seed": 1,
                "maps": {"field_deg": 5.0, "pixels": 16, "method": "born", "source_redshifts": [0.5],
                         "randomize_planes": True}}
    out = tmp_path / "maps.h5"
    proc = run("trace", "--model", "m", "--realization", "0", "--settings", json.dumps(settings),
               "--planes", str(planes), "--output", str(out))
    assert proc.returncode == 0, proc.stderr
    assert out.exists()
    assert any("maps.field_deg" in line and "wider than the box" in line for line in proc.stderr.splitlines())
