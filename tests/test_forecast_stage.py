"""The stack and forecast stages on files: statistics files -> stack -> Fisher forecast.

The numerics of :mod:`raytrace.forecast` have their own tests (tests/test_forecast.py);
these check the stages around them: the flattening and labelling of statistics files,
the pairing of realisations across models, the selection of maps, the survey-area
scaling and the products.
"""

from __future__ import annotations

import json
import subprocess
import sys

import h5py
import numpy as np
import pytest

from raytrace import forecast as fc
from raytrace.errors import RaytraceError
from raytrace.forecasting import run_forecast, write_products
from raytrace.plots import ellipse_curve
from raytrace.stack import entry_maps, map_selection, read_stack, read_statistics, write_stack


def write_statistics_file(path, stats: dict) -> None:
    """A file in the measure stage's layout: {statistic: {subgroup: (values, entries, centers)}}."""
    with h5py.File(path, "w") as f:
        for name, groups in stats.items():
            g = f.create_group(name)
            for sub, (values, entries, centers) in groups.items():
                s = g.create_group(sub)
                s.create_dataset("values", data=np.asarray(values, dtype=float))
                s.create_dataset("bin_centers", data=np.asarray(centers, dtype=float))
                s.attrs["entries"] = json.dumps(entries)
                s.attrs["bin_name"] = "ell" if name == "power_spectrum" else "nu"
                s.attrs["smoothing_arcmin"] = 0.0 if sub == "unsmoothed" else float(sub.split("_")[1][:-6])


def test_stack_flattens_in_file_order_and_drops_undefined_elements(tmp_path):
    rng = np.random.default_rng(1)
    paths = []
    for r in range(3):
        ps = rng.normal(size=(3, 4))
        ps[2, 0] = np.nan  # undefined in every realisation (a bin without modes)
        peaks = rng.normal(size=(2, 5))
        p = tmp_path / f"r{r:04d}.h5"
        write_statistics_file(p, {
            "power_spectrum": {"unsmoothed": (ps, ["bin0", "bin0xbin1", "bin1"], [100, 200, 400, 800])},
            "peaks": {"smoothing_2arcmin": (peaks, ["bin0", "bin1"], np.arange(5.0))},
        })
        paths.append(p)
    table, bin_names = read_statistics(paths, model="m")
    assert table.values.shape == (3, 12 - 1 + 10)
    assert list(table.seeds) == [0, 1, 2]
    lab = table.labels
    # groups in alphabetical order (h5py's default iteration), then entry, then bin
    assert list(lab["statistic"]) == ["peaks"] * 10 + ["power_spectrum"] * 11
    assert list(lab["entry"][10:14]) == ["bin0"] * 4 and lab["entry"][18] == "bin1"  # bin1's first bin is gone
    assert list(lab["center"][18:]) == [200, 400, 800]
    assert lab["smoothing_arcmin"][0] == 2.0 and bin_names[0] == "nu" and bin_names[-1] == "ell"
    with h5py.File(paths[1]) as f:
        np.testing.assert_array_equal(table.values[1, 5:10], f["peaks/smoothing_2arcmin/values"][1])
    out = tmp_path / "stack.h5"
    write_stack(out, table, bin_names, model="m", inputs=paths)
    back, names = read_stack(out)
    np.testing.assert_array_equal(back.values, table.values)
    assert list(back.labels["entry"]) == list(lab["entry"]) and names == bin_names
    with h5py.File(out) as f:
        # unbiased sample covariance (N - 1), e.g. numpy.cov
        np.testing.assert_allclose(f["covariance"][...], np.cov(table.values, rowvar=False), rtol=1e-12)
        assert f.attrs["model"] == "m"


def test_stack_errors_name_the_file(tmp_path):
    a, b = tmp_path / "r0000.h5", tmp_path / "r0001.h5"
    write_statistics_file(a, {"peaks": {"smoothing_2arcmin": (np.ones((1, 3)), ["bin0"], [0, 1, 2])}})
    write_statistics_file(b, {"peaks": {"smoothing_2arcmin": (np.ones((1, 3)), ["bin1"], [0, 1, 2])}})
    with pytest.raises(RaytraceError, match="r0001.h5: its statistics, entries or bins differ"):
        read_statistics([a, b])
    write_statistics_file(b, {"peaks": {"smoothing_2arcmin": ([[1.0, np.nan, 2.0]], ["bin0"], [0, 1, 2])}})
    with pytest.raises(RaytraceError, match="r0001.h5: non-finite statistics"):
        read_statistics([a, b])
    bad = tmp_path / "stats.h5"
    bad.write_bytes(a.read_bytes())
    with pytest.raises(RaytraceError, match="stats.h5: file name does not end in r<realisation>.h5"):
        read_statistics([bad])


def test_entry_maps_and_selection():
    assert entry_maps("V0:bin0") == ("bin0",)
    assert entry_maps("z0.50xbin1") == ("z0.50", "bin1")
    assert entry_maps("isosceles_r0.5:z1.00") == ("z1.00",)
    labels = fc.make_labels("s", ["bin0", "bin0xbin1", "z0.50xbin1", "V1:bin1"], 0.0, 1.0)
    assert list(map_selection(labels, ["bin0", "bin1"])) == [True, True, False, True]


# ------------------------------------------------------------------- linear model
def linear_suite(tmp_path, n_fid=3000, n_pairs=40, seed=0):
    """Stacks of a linear model d = mu + J theta + noise with known Jacobian and covariance.

    Every model's realisation r has the same noise draw (paired realisations), so the
    finite differences are exact: J is recovered without noise.
    """
    rng = np.random.default_rng(seed)
    stats = ["power_spectrum"] * 4 + ["peaks"] * 3
    entries = ["bin0"] * 2 + ["bin1"] * 2 + ["bin0"] * 3 + ["z0.50"]
    labels = fc.make_labels(stats + ["peaks"], entries, 0.0, np.arange(8.0))
    jac = rng.normal(size=(2, 8))
    a = rng.normal(size=(8, 8))
    cov = a @ a.T / 8 + np.eye(8)
    noise = rng.multivariate_normal(np.zeros(8), cov, size=n_fid)
    fid = {"m_nu_eV": 0.1, "A_s": 2.0}
    models = {"fiducial": fid, "mnu_lo": {**fid, "m_nu_eV": 0.0}, "mnu_hi": {**fid, "m_nu_eV": 0.2},
              "as_hi": {**fid, "A_s": 2.2}}
    paths = {}
    for name, theta in models.items():
        n = n_fid if name == "fiducial" else n_pairs
        mean = 5.0 + np.array([theta["m_nu_eV"], theta["A_s"]]) @ jac
        table = fc.DataTable(mean + noise[:n], labels, np.arange(n), name=name)
        paths[name] = tmp_path / f"{name}.h5"
        write_stack(paths[name], table, ["ell"] * 8, model=name)
    settings = {
        "forecast": {"fiducial": "fiducial", "parameters": {"m_nu_eV": ["mnu_lo", "mnu_hi"], "A_s": ["as_hi"]},
                     "combinations": [["power_spectrum"], ["peaks"], ["power_spectrum", "peaks"]],
                     "survey_area_deg2": 1000.0},
        "steps": {"m_nu_eV": {"minus": ("mnu_lo", 0.0), "plus": ("mnu_hi", 0.2)}, "A_s": {"plus": ("as_hi", 2.2)}},
        "fiducial_values": fid,
        "maps": ["bin0", "bin1"],
        "map_area_deg2": 10.0,
    }
    return settings, paths, jac, cov


def test_forecast_stage_recovers_the_exact_fisher_matrix_of_a_linear_model(tmp_path):
    settings, paths, jac, cov = linear_suite(tmp_path)
    out = run_forecast(settings, paths)  # warnings are collected by the stage, not raised
    # the z0.50 element is not in forecast.maps; the rest are kept in file order
    assert out.labels.shape == (7,)
    # paired realisations: the derivatives are exact (same noise in every model)
    np.testing.assert_allclose(out.derivatives.mean, jac[:, :7], rtol=1e-9, atol=1e-9)
    assert out.derivatives.kind == ["central", "forward"]
    assert any("one-sided" in w for w in out.warnings)
    # F = (A_survey / A_map) h J C^-1 J^T (Tegmark, Taylor & Heavens 1997; Hartlap et al. 2007)
    both = out.results[2]
    j, c = jac[:, :7], cov[:7, :7]
    exact = 100.0 * j @ np.linalg.solve(c, j.T)
    assert both.hartlap == pytest.approx((3000 - 7 - 2) / (3000 - 1))
    # the sample covariance of 3000 draws: the Fisher matrix within a few per cent of
    # its scale sqrt(F_aa F_bb) (noise of order sqrt(2 / N) per element)
    scale = np.sqrt(np.outer(np.diag(exact), np.diag(exact)))
    assert np.max(np.abs(both.fisher - exact) / scale) < 0.06
    np.testing.assert_allclose(both.covariance, np.linalg.inv(both.fisher), rtol=1e-8)
    assert out.area_factor == 100.0


def test_combined_constraint_never_weaker_than_a_single_statistic(tmp_path):
    # Before the finite-sample corrections the Fisher information of a data vector
    # dominates that of any part of it (Cramer-Rao; e.g. Tegmark, Taylor & Heavens 1997),
    # so sigma(combined) <= min sigma(single) for every parameter.
    for seed in range(4):
        settings, paths, _, _ = linear_suite(tmp_path, n_fid=200, seed=seed)
        out = run_forecast(settings, paths)
        raw = {r.name: r.marginalised * np.sqrt(r.hartlap) for r in out.results}  # undo Hartlap
        combined = raw["power_spectrum+peaks"]
        assert np.all(combined <= np.minimum(raw["power_spectrum"], raw["peaks"]) * (1 + 1e-12))


def test_forecast_products_on_disk(tmp_path):
    settings, paths, _, _ = linear_suite(tmp_path, n_fid=300)
    settings["forecast"]["priors"] = {"sigma": {"A_s": 0.01}, "label": "prior"}
    out = run_forecast(settings, paths)
    names = {k: tmp_path / v for k, v in dict(h5_path="f.h5", csv_path="e.csv", html_path="e.html",
                                               diagnostics_path="d.csv", png_path="e.png").items()}
    write_products(out, settings=settings, inputs=[str(p) for p in paths.values()], **names)
    rows = names["csv_path"].read_text().splitlines()
    assert len(rows) == 1 + 2 * 6  # 3 combinations, each also with the prior, 2 parameters
    with h5py.File(names["h5_path"]) as f:
        g = f["combinations/power_spectrum+peaks + prior"]
        # a Gaussian prior adds 1/sigma^2 to the Fisher matrix (e.g. Coe 2009, Sec. 5)
        np.testing.assert_allclose(
            g["fisher"][...] - f["combinations/power_spectrum+peaks/fisher"][...], np.diag([0.0, 1e4]), atol=1e-6)
        assert f["combinations/peaks/half_covariance"].shape == (2, 2)
    assert "σ(m_nu_eV)" in names["html_path"].read_text()
    assert names["png_path"].read_bytes()[:4] == b"\x89PNG"
    assert len(names["diagnostics_path"].read_text().splitlines()) == 1 + 3 * 2


def test_forecast_stage_errors(tmp_path):
    settings, paths, _, _ = linear_suite(tmp_path, n_fid=50)
    bad = dict(settings, maps=["bin7"])
    with pytest.raises(RaytraceError, match="forecast.maps: no data element involves only the maps bin7"):
        run_forecast(bad, paths)
    missing = {k: v for k, v in paths.items() if k != "fiducial"}
    with pytest.raises(RaytraceError, match="forecast.fiducial: no stack file"):
        run_forecast(settings, missing)


def test_ellipse_curve_lies_on_the_contour_for_parameters_of_very_different_scale():
    # delta^T C^-1 delta = Delta chi^2 on every point (the definition of the contour;
    # Coe 2009); variances 1e-20 and 1e-3 with correlation 0.9, as for (A_s, m_nu)
    s = np.array([1e-10, 3e-2])
    c = np.outer(s, s) * np.array([[1.0, 0.9], [0.9, 1.0]])
    x, y = ellipse_curve(c, 2.30)
    pts = np.vstack([x, y])
    chi2 = np.einsum("in,ij,jn->n", pts, np.linalg.inv(c), pts)
    np.testing.assert_allclose(chi2, 2.30, rtol=1e-9)
    # extent along each axis: sqrt(Delta chi^2 C_ii) (the marginalised projection)
    assert np.max(np.abs(x)) == pytest.approx(np.sqrt(2.30) * s[0], rel=1e-3)


def test_forecast_cli_bad_settings_is_one_line_error(tmp_path):
    proc = subprocess.run(
        [sys.executable, "-m", "raytrace", "forecast", "--settings", "{not json", "--stacks", "x.h5",
         "--output", str(tmp_path / "f.h5"), "--table", "t.csv", "--html", "t.html", "--diagnostics", "d.csv",
         "--ellipses", "e.png"], capture_output=True, text=True, cwd=tmp_path)
    assert proc.returncode == 2
    assert proc.stderr.strip().count("\n") == 0 and "--settings: not valid JSON" in proc.stderr
    assert not (tmp_path / "f.h5").exists()


def nuisance_suite(tmp_path, prior_sigma):
    """The linear suite plus a nuisance parameter b observed as two variants of the fiducial."""
    settings, paths, jac, cov = linear_suite(tmp_path, n_fid=400)
    rng = np.random.default_rng(7)
    jb = jac[0] + 0.3 * rng.normal(size=8)  # degenerate with m_nu_eV, so marginalising costs
    fid_table, _ = read_stack(paths["fiducial"])
    for name, b in (("minus", -0.05), ("plus", 0.05)):
        t = fc.DataTable(fid_table.values[:40] + b * jb, fid_table.labels, fid_table.seeds[:40],
                         name=f"fiducial@nu_{name}")
        paths[t.name] = tmp_path / f"nu_{name}.h5"
        write_stack(paths[t.name], t, ["ell"] * 8, model=t.name)
    settings["nuisance"] = {"b": {"fiducial": 0.0, "prior_sigma": prior_sigma,
                                  "minus": ["fiducial@nu_minus", -0.05], "plus": ["fiducial@nu_plus", 0.05]}}
    return settings, paths, jb


def test_nuisance_derivatives_and_degradation(tmp_path):
    settings, paths, jb = nuisance_suite(tmp_path, prior_sigma=0.1)
    out = run_forecast(settings, paths)
    assert [r.name for r in out.with_nuisance] == [f"{r.name} + nuisances" for r in out.results]
    full = out.with_nuisance[2]
    assert full.parameters == ["m_nu_eV", "A_s", "b"]
    # paired variants of the fiducial: the nuisance derivative is exact
    np.testing.assert_allclose(full.fisher[2, 2] - 1 / 0.1**2,
                               100 * full.hartlap * jb[:7] @ np.linalg.solve(
                                   np.cov(read_stack(paths["fiducial"])[0].values[:, :7], rowvar=False), jb[:7]),
                               rtol=1e-6)
    # marginalising over a parameter never shrinks an error (Cramer-Rao; Tegmark et al. 1997)
    for name, without, ratios in out.degradation:
        assert all(r >= 1 - 1e-12 for r in ratios.values()), (name, ratios)
    assert max(out.degradation[2][2].values()) > 1.01  # the degeneracy costs something


def test_tight_nuisance_priors_give_the_fixed_nuisance_errors(tmp_path):
    # A prior of width sigma_b adds 1/sigma_b^2 to F_bb (Coe 2009); as sigma_b -> 0 the
    # marginalised errors on the other parameters tend to those with b fixed.
    settings, paths, _ = nuisance_suite(tmp_path, prior_sigma=1e-7)
    out = run_forecast(settings, paths)
    for name, without, ratios in out.degradation:
        for q, r in ratios.items():
            assert r == pytest.approx(1.0, abs=1e-6), (name, q)


def test_duplicated_and_dependent_elements_are_dropped(tmp_path):
    # an exact duplicate and a sum of two elements of the same statistic carry no information
    # and make the sample covariance singular (common practice: remove them before inverting)
    settings, paths, _, _ = linear_suite(tmp_path, n_fid=300)
    for name, path in list(paths.items()):
        t, bins = read_stack(path)
        v = t.values.copy()
        v[:, 1] = v[:, 0]  # power_spectrum element 1 duplicates element 0
        v[:, 6] = v[:, 4] + v[:, 5]  # peaks element 6 = 4 + 5
        write_stack(path, fc.DataTable(v, t.labels, t.seeds, name=name), bins, model=name)
    out = run_forecast(settings, paths)
    assert list(out.labels["center"]) == [0.0, 2.0, 3.0, 4.0, 5.0]
    assert any("exact linear combinations" in w for w in out.warnings)
