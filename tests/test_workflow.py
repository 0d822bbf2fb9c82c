"""The workflow end to end on a tiny suite, and exact reruns (Snakemake dry runs)."""

from __future__ import annotations

import copy

import h5py
import numpy as np
import pytest

from workflow_helpers import (check_jobs_within_requests, check_kill_and_resume, kill_during_trace, planned_jobs,
                              seed_snapshots, snakemake, snakemake_command)

# `finished_run` (conftest.py): the tiny configuration run once with the laptop profile.


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


def test_changing_the_noise_seed_reruns_only_observing_onward(finished_run):
    work, cfg = finished_run
    changed = copy.deepcopy(cfg)
    changed["survey"]["noise"]["seed"] = cfg["seed"] + 1  # the noise seed: nothing before observing reads it
    jobs = planned_jobs(snakemake(work, changed, "-n"))
    assert jobs == {"observe": 3, "measure": 3, "stack": 2, "forecast": 1, "plot_maps": 1,
                    "observe_variant": 2, "measure_variant": 2, "stack_variant": 2,
                    "plot_statistics": 1, "provenance": 1, "all": 1}, jobs
    same = copy.deepcopy(cfg)
    same["survey"]["noise"]["seed"] = cfg["seed"]  # its default, written out: nothing changes
    assert planned_jobs(snakemake(work, same, "-n")) == {"provenance": 1, "all": 1}


def test_the_noise_seed_draws_new_noise_on_the_same_mask(finished_run, tmp_path):
    from raytrace.observe import observe

    work, cfg = finished_run
    maps = work / "results/maps/fiducial/r0003.h5"
    survey = {k: v for k, v in copy.deepcopy(cfg["survey"]).items() if k not in ("sources", "catalog", "fits")}
    survey.pop("systematics")

    def observed(noise_seed=None):
        settings = copy.deepcopy(survey)
        if noise_seed is not None:
            settings["noise"]["seed"] = noise_seed
        out = tmp_path / f"observed_{noise_seed}.h5"
        observe(maps, out, settings, seed=cfg["seed"], realization=3)
        with h5py.File(out) as f:
            return {k: f[k][...] for k in ("kappa", "gamma1", "mask")}

    default, master, other = observed(), observed(cfg["seed"]), observed(cfg["seed"] + 1)
    for key in ("kappa", "gamma1", "mask"):  # the default is the master seed, bit for bit ...
        np.testing.assert_array_equal(default[key], master[key])
    # ... as the workflow's own file of that realisation is
    with h5py.File(work / "results/observed/fiducial/r0003.h5") as f:
        np.testing.assert_array_equal(f["kappa"][...], default["kappa"])
    np.testing.assert_array_equal(other["mask"], default["mask"])  # the survey's mask stays
    valid = default["mask"] > 0
    for key in ("kappa", "gamma1"):
        assert not np.allclose(other[key][:, valid], default[key][:, valid])
        # the same signal under new noise of the same size
        assert np.std(other[key][:, valid]) == pytest.approx(np.std(default[key][:, valid]), rel=0.1)


def dry_run_resources(proc) -> list[dict]:
    """Rule, wildcards, threads and resources of every job a dry run lists."""
    import re

    jobs = []
    for block in re.split(r"\n(?=\s*(?:local)?rule \w+:)", proc.stdout + proc.stderr):
        rule = re.match(r"\s*(?:local)?rule (\w+):", block)
        res = re.search(r"^\s*resources: (.*)$", block, re.M)
        if not rule or not res:
            continue
        wildcards = re.search(r"^\s*wildcards: (.*)$", block, re.M)
        threads = re.search(r"^\s*threads: (\d+)$", block, re.M)
        jobs.append({"rule": rule.group(1), "threads": int(threads.group(1)) if threads else 1,
                     "wildcards": dict(kv.split("=", 1) for kv in wildcards.group(1).split(", ")) if wildcards else {},
                     **{k: v for k, v in (kv.split("=", 1) for kv in res.group(1).split(", "))}})
    return jobs


def test_every_job_asks_for_the_resources_its_rule_computes(finished_run):
    from raytrace import config as rc
    from raytrace import resources as rr

    work, cfg = finished_run
    full = rc.validate(copy.deepcopy(cfg))
    jobs = [j for j in dry_run_resources(snakemake(work, cfg, "-n", "--forceall")) if j["rule"] != "all"]
    assert {j["rule"] for j in jobs} == set(rr.rules_of(full))  # every rule of the workflow, each with its estimate
    for job in jobs:
        want = rr.estimate(job["rule"], full, model=job["wildcards"].get("model"))
        assert (int(job["mem_mb"]), int(job["runtime"]), job["threads"]) == (
            want.mem_mb, want.runtime_min, want.threads), job
    # and what the jobs of the tiny run used fits in what they ask for
    assert {"slice", "trace", "observe", "measure"} <= check_jobs_within_requests(work, full)


def test_a_run_killed_midway_resumes_to_the_same_outputs(finished_run, tmp_path):
    # SIGKILL to Snakemake and its jobs while a trace job is half-way through its batch (some
    # of its files written, one being written), then the same command again: it completes
    # with the outputs of the uninterrupted run. The run starts from the demo snapshots, like a
    # run of user simulations. Under SLURM: tests/test_slurm.py (-m slow).
    from raytrace import config as rc

    reference, cfg = finished_run
    seed_snapshots(reference, tmp_path)
    killed = kill_during_trace(snakemake_command(tmp_path, cfg), tmp_path, rc.realizations_per_job(rc.validate(cfg)))
    check_kill_and_resume(reference, tmp_path, cfg, killed, lambda: snakemake(tmp_path, cfg))
