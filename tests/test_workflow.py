"""The workflow end to end on a tiny suite, and exact reruns (Snakemake dry runs)."""

from __future__ import annotations

import copy
import re
import subprocess
import sys
from pathlib import Path

import h5py
import numpy as np
import pytest
import yaml

ROOT = Path(__file__).resolve().parents[1]


def tiny_config() -> dict:
    cfg = yaml.safe_load((ROOT / "config" / "small.yaml").read_text())
    cfg["output"] = "results"
    cfg["suite"]["models"] = {"fiducial": {}, "m_nu_zero": {"m_nu_eV": 0.0}}
    cfg["maps"]["realizations"] = 10  # one job of 10 per model and stage ...
    cfg["forecast"]["covariance_realizations"] = 20  # ... and two for the fiducial
    cfg["forecast"]["parameters"] = {"m_nu_eV": ["m_nu_zero"]}  # one-sided
    cfg["forecast"]["maps"] = ["bin1"]  # a data vector short enough for 20 realisations
    cfg["forecast"]["priors"] = {"sigma": {"m_nu_eV": 0.5}}
    cfg["forecast"]["nuisance"] = {"alignment": {"step": 0.5, "prior_sigma": 1.0}}  # two observe variants
    return cfg


def snakemake(workdir: Path, cfg: dict, *extra: str) -> subprocess.CompletedProcess:
    path = workdir / "config.yaml"
    path.write_text(yaml.safe_dump(cfg))
    return subprocess.run(
        [sys.executable, "-m", "snakemake", "-s", str(ROOT / "Snakefile"), "-d", str(workdir),
         "--profile", str(ROOT / "profiles" / "laptop"), "--cores", "2", "--configfile", str(path), *extra],
        capture_output=True, text=True,
    )


def planned_jobs(proc) -> dict[str, int]:
    """Rule -> job count from a dry run's 'Job stats' table."""
    text = proc.stdout + proc.stderr
    if "Nothing to be done" in text:
        return {}
    table = text.split("Job stats:", 1)[1]
    jobs = {}
    for line in table.splitlines()[3:]:
        m = re.match(r"^(\w+)\s+(\d+)\s*$", line.strip())
        if not m:
            break
        jobs[m.group(1)] = int(m.group(2))
    jobs.pop("total", None)
    return jobs


@pytest.fixture(scope="module")
def finished_run(tmp_path_factory):
    work = tmp_path_factory.mktemp("workflow")
    cfg = tiny_config()
    proc = snakemake(work, cfg)
    assert proc.returncode == 0, proc.stderr[-3000:]
    return work, cfg


def test_outputs_exist_with_their_layout(finished_run):
    work, cfg = finished_run
    with h5py.File(work / "results/maps/fiducial/r0000.h5") as f:
        for key in ("kappa", "gamma1", "gamma2", "omega"):
            assert f[key].shape == (2, 64, 64)
        assert list(f.attrs["source_redshifts"]) == [0.5, 1.0]
        assert f.attrs["method"] == "multi-plane"
        assert f.attrs["field_deg"] == 2.0
        assert "raytrace_version" in f.attrs and "settings_json" in f.attrs
        assert f["bins/kappa"].shape == (2, 64, 64)  # the two tomographic bins
    with h5py.File(work / "results/observed/fiducial/r0000.h5") as f:
        assert f["kappa_smoothed"].shape == (2, 4, 64, 64)  # two scales x (2 sources + 2 bins)
        assert 0.9 < f.attrs["valid_fraction"] < 1.0  # star holes remove a few per cent
    with h5py.File(work / "results/statistics/fiducial/r0000.h5") as f:
        values = f["power_spectrum/unsmoothed/values"][...]
        assert values.shape == (10, 8)  # 4 autos and 6 cross spectra of 4 maps, 8 ell bins
        assert np.all(values[:1] > 0)
        for name in ("pdf", "peaks", "minima", "minkowski", "moments"):
            assert set(f[name]) == {"smoothing_2arcmin", "smoothing_4arcmin"}, name
        assert "unsmoothed" in f["bispectrum"]
    assert (work / "results/catalogs/fiducial/r0000.fits").exists()
    from astropy.io import fits
    from astropy.wcs import WCS

    with fits.open(work / "results/fits/fiducial/r0000_kappa.fits") as hdus:
        assert [h.name for h in hdus[1:]] == ["Z0.50", "Z1.00", "BIN0", "BIN1"]
        # the field centre (config: ra 150, dec 2) sits between the two central pixels
        ra, dec = WCS(hdus[1].header).wcs_pix2world([[31.5, 31.5]], 0)[0]
        assert (ra, dec) == pytest.approx((150.0, 2.0), abs=1e-9)
    # each stage logs its wall time and peak memory
    log = (work / "logs/trace/fiducial_b000.log").read_text()
    assert "wall time" in log and "peak memory" in log
    assert log.count("item ") == 10  # one job traced realisations 0-9
    assert (work / "logs/benchmarks/trace/fiducial_b000.tsv").exists()


def test_stack_and_forecast_products(finished_run):
    work, cfg = finished_run
    with h5py.File(work / "results/stacks/fiducial.h5") as f:
        assert f["values"].shape[0] == 20 and list(f["realizations"][...]) == list(range(20))
        n = f["values"].shape[1]
        assert f["covariance"].shape == (n, n)
        # the bispectrum's empty triangle bins (NaN in every file) are left out
        assert np.all(np.isfinite(f["values"][...]))
    with h5py.File(work / "results/stacks/m_nu_zero.h5") as f:
        assert f["values"].shape[0] == 10
    rows = (work / "results/forecast/errors.csv").read_text().splitlines()
    assert rows[0].startswith("parameter,combination")
    names = list(dict.fromkeys(r.split(",")[1] for r in rows[1:]))
    base = ["power_spectrum", "peaks", "power_spectrum+peaks"]
    assert names == base + [f"{b} + prior" for b in base] + [f"{b} + nuisances" for b in base] + [
        f"{b} + prior + nuisances" for b in base]
    degradation = (work / "results/forecast/degradation.csv").read_text().splitlines()
    assert len(degradation) == 1 + 6  # 6 forecasts without nuisances x 1 cosmological parameter
    assert all(float(r.split(",")[-1]) >= 1 - 1e-9 for r in degradation[1:])  # marginalising never helps
    with h5py.File(work / "results/forecast/forecast.h5") as f:
        warnings = f.attrs["warnings"]
        assert "one-sided" in warnings  # only m_nu_zero exists below the fiducial
        for name in ("power_spectrum", "peaks", "power_spectrum+peaks"):
            assert f[f"combinations/{name}/half_derivatives"].shape == (2, 1)
        # a Gaussian prior of 0.5 eV: the error with it is below both the prior and the data alone
        alone = f["combinations/power_spectrum/marginalised"][0]
        both = f["combinations/power_spectrum + prior/marginalised"][0]
        assert both < min(alone, 0.5)
        assert both == pytest.approx((alone**-2 + 0.5**-2) ** -0.5, rel=1e-9)  # one parameter: 1/sigma^2 add
    for name in ("maps.png", "provenance.html") + tuple(f"statistics/{s}.png" for s in cfg["statistics"]):
        assert (work / "results/report" / name).stat().st_size > 1000, name


def test_report_contains_the_figures(finished_run):
    work, cfg = finished_run
    proc = snakemake(work, cfg, "--report", "results/report.html")
    assert proc.returncode == 0, proc.stderr[-3000:]
    text = (work / "results/report.html").read_text()
    for name in ("ellipses.png", "errors.html", "degradation.csv", "maps.png", "power_spectrum.png", "peaks.png",
                 "provenance.html"):
        assert name in text, name
    assert "3. Forecast" in text and "Dodelson" in text  # categories and captions


def test_second_run_does_nothing(finished_run):
    work, cfg = finished_run
    assert planned_jobs(snakemake(work, cfg, "-n")) == {}


def test_changing_power_spectrum_bins_reruns_only_measuring(finished_run):
    work, cfg = finished_run
    changed = copy.deepcopy(cfg)
    changed["statistics"]["power_spectrum"]["bins"] = 6
    jobs = planned_jobs(snakemake(work, changed, "-n"))
    assert jobs == {"measure": 3, "measure_variant": 2, "stack": 2, "stack_variant": 2, "forecast": 1,
                    "plot_statistics": 1, "provenance": 1, "all": 1}, jobs


def test_changing_the_plane_grid_reruns_slicing_onward(finished_run):
    work, cfg = finished_run
    changed = copy.deepcopy(cfg)
    changed["planes"]["grid"] = 64
    jobs = planned_jobs(snakemake(work, changed, "-n"))
    assert jobs == {"slice": 6, "trace": 3, "observe": 3, "measure": 3, "stack": 2, "forecast": 1,
                    "observe_variant": 2, "measure_variant": 2, "stack_variant": 2,
                    "plot_maps": 1, "plot_statistics": 1, "provenance": 1, "all": 1}, jobs


def test_changing_the_smoothing_reruns_observing_onward(finished_run):
    work, cfg = finished_run
    changed = copy.deepcopy(cfg)
    changed["survey"]["smoothing"]["scales_arcmin"] = [3.0]
    jobs = planned_jobs(snakemake(work, changed, "-n"))
    assert jobs == {"observe": 3, "measure": 3, "stack": 2, "forecast": 1, "plot_maps": 1,
                    "observe_variant": 2, "measure_variant": 2, "stack_variant": 2,
                    "plot_statistics": 1, "provenance": 1, "all": 1}, jobs
