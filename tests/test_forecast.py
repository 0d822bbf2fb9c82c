"""Tests of the Fisher-forecast mathematics against published formulas."""

from __future__ import annotations

import csv
import math
import warnings

import numpy as np
import pytest
import scipy.stats

from raytrace.errors import RaytraceError
from raytrace import forecast as fc


# ------------------------------------------------------------------ fixtures


def random_spd(rng: np.random.Generator, n: int, cond_floor: float = 0.2) -> np.ndarray:
    """A random positive-definite matrix with substantial off-diagonal correlations."""
    a = rng.normal(size=(n, n))
    c = a @ a.T / n + cond_floor * np.eye(n)
    return c


def linear_model(rng: np.random.Generator, n_data: int = 8, n_params: int = 3):
    """d = d0 + J theta with known covariance C (the test case of the brief)."""
    d0 = rng.normal(size=n_data) + 5.0
    jac = rng.normal(size=(n_params, n_data))  # rows: d(d)/d(theta_alpha)
    cov = random_spd(rng, n_data)
    return d0, jac, cov


def two_stat_labels(n_a: int, n_b: int) -> np.ndarray:
    return fc.make_labels(
        ["power_spectrum"] * n_a + ["peaks"] * n_b,
        "z1.00",
        [0.0] * n_a + [2.0] * n_b,
        list(np.geomspace(100, 3000, n_a)) + list(np.linspace(-1, 4, n_b)),
    )


# ------------------------------------------------------------------ summary


def test_ensemble_summary_matches_unbiased_estimator():
    rng = np.random.default_rng(1)
    x = rng.normal(size=(50, 4)) @ random_spd(rng, 4)
    s = fc.ensemble_summary(x)
    # Unbiased (N-1) sample covariance: numpy's np.cov with ddof=1 implements the textbook formula.
    np.testing.assert_allclose(s.covariance, np.cov(x, rowvar=False, ddof=1), rtol=1e-12)
    np.testing.assert_allclose(s.mean, x.mean(axis=0), rtol=1e-12)
    np.testing.assert_allclose(s.correlation, np.corrcoef(x, rowvar=False), rtol=1e-12)
    np.testing.assert_allclose(np.diag(s.correlation), 1.0, rtol=1e-12)


def test_ensemble_summary_needs_two_realisations():
    table = fc.DataTable(np.ones((1, 3)), fc.make_labels("peaks", "z1", 1.0, [0, 1, 2]), name="fid.h5")
    with pytest.raises(RaytraceError, match="fid.h5"):
        fc.ensemble_summary(table)


# ------------------------------------------------------------ linear model


def test_fisher_exact_for_linear_model():
    rng = np.random.default_rng(2)
    _, jac, cov = linear_model(rng)
    fisher = fc.fisher_matrix(jac, cov, None)
    # Tegmark, Taylor & Heavens (1997) Eq. 15 (mean term): F = J^T C^-1 J.
    expected = jac @ np.linalg.inv(cov) @ jac.T
    np.testing.assert_allclose(fisher, expected, rtol=1e-10)


def test_hartlap_corrected_fisher_is_unbiased_over_trials():
    """Mean over many small ensembles: unbiased with the Hartlap factor, biased without."""
    rng = np.random.default_rng(3)
    n_data, n_sims, n_trials = 20, 30, 400
    _, jac, cov = linear_model(rng, n_data=n_data, n_params=2)
    f_true = jac @ np.linalg.inv(cov) @ jac.T
    chol = np.linalg.cholesky(cov)
    ratio_h, ratio_raw = [], []
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # Hartlap factor 0.28 < 0.8 warns on every trial
        for _ in range(n_trials):
            x = rng.normal(size=(n_sims, n_data)) @ chol.T
            c_hat = fc.ensemble_summary(x).covariance
            ratio_h.append(fc.fisher_matrix(jac, c_hat, n_sims)[0, 0] / f_true[0, 0])
            ratio_raw.append(fc.fisher_matrix(jac, c_hat, n_sims, hartlap=False)[0, 0] / f_true[0, 0])
    # For fixed v, v^T C^-1 v / v^T S^-1 v ~ chi^2_{N-p} with S = (N-1) C_hat Wishart
    # (e.g. Muirhead 1982, Thm 3.2.12; from memory), so F_hat/F = (N-p-2)/chi^2_{N-p}:
    # mean 1, variance 2/(N-p-4) (Taylor, Joachimi & Kitching 2013).
    k = n_sims - n_data
    sd_mean = math.sqrt(2.0 / (k - 4)) / math.sqrt(n_trials)
    assert abs(np.mean(ratio_h) - 1.0) < 4.0 * sd_mean
    # Without the factor the mean is (N-1)/(N-p-2) (Hartlap et al. 2007): 3.6 here.
    raw_expected = (n_sims - 1) / (n_sims - n_data - 2)
    assert abs(np.mean(ratio_raw) - raw_expected) < 4.0 * sd_mean * raw_expected
    assert abs(np.mean(ratio_raw) - 1.0) > 20 * sd_mean


def test_fisher_from_realisations_converges_to_truth():
    """Many realisations of d = d0 + J theta + noise: covariance and derivatives from sims."""
    rng = np.random.default_rng(4)
    n_data, n_sims = 8, 4000
    d0, jac, cov = linear_model(rng, n_data=n_data, n_params=3)
    chol = np.linalg.cholesky(cov)
    labels = fc.make_labels("power_spectrum", "z1.00", 0.0, np.arange(n_data) + 1.0)
    seeds = np.arange(n_sims)
    noise = rng.normal(size=(n_sims, n_data)) @ chol.T
    theta0 = np.array([0.1, 0.3, 2.1])
    steps = np.array([0.05, 0.01, 0.1])
    tables = {"fid": fc.DataTable(d0 + theta0 @ jac + noise, labels, seeds, "fid")}
    spec = {}
    names = ["M_nu", "Omega_m", "A_s"]
    for a, name in enumerate(names):
        for side, sign in (("plus", 1), ("minus", -1)):
            th = theta0.copy()
            th[a] += sign * steps[a]
            tables[f"{name}_{side}"] = fc.DataTable(d0 + th @ jac + noise, labels, seeds, f"{name}_{side}")
        spec[name] = {"plus": (f"{name}_plus", theta0[a] + steps[a]), "minus": (f"{name}_minus", theta0[a] - steps[a])}
    der = fc.derivatives(tables, spec, ("fid", dict(zip(names, theta0))))
    # Linear model with paired noise: the central difference is exact (Press et al. 2007, Sec. 5.7).
    np.testing.assert_allclose(der.mean, jac, rtol=1e-9, atol=1e-9)
    summary = fc.ensemble_summary(tables["fid"])
    fisher = fc.fisher_matrix(der, summary.covariance, n_sims)
    f_true = jac @ np.linalg.inv(cov) @ jac.T
    # Fractional scatter of a Hartlap-debiased Fisher element: sqrt(2/(N-p-4))
    # (Taylor, Joachimi & Kitching 2013); 4-sigma tolerance on the diagonal.
    tol = 4.0 * math.sqrt(2.0 / (n_sims - n_data - 4))
    np.testing.assert_allclose(np.diag(fisher), np.diag(f_true), rtol=tol)
    marg, _ = fc.parameter_errors(fisher)
    marg_true, _ = fc.parameter_errors(f_true)
    np.testing.assert_allclose(marg, marg_true, rtol=tol)


def test_ellipse_axes_are_eigen_decomposition_of_inverse_fisher():
    rng = np.random.default_rng(5)
    _, jac, cov = linear_model(rng, n_params=3)
    fisher = fc.fisher_matrix(jac, cov, None)
    pcov = fc.parameter_covariance(fisher)
    c2 = fc.pair_covariance(pcov, 0, 2)
    np.testing.assert_allclose(c2, np.linalg.inv(fisher)[np.ix_([0, 2], [0, 2])], rtol=1e-10)
    e1, e2 = fc.ellipse_parameters(c2)
    w, v = np.linalg.eigh(c2)
    # Coe (2009): semi-axes sqrt(Delta chi^2 * eigenvalue), Delta chi^2 = 2.30 for 1 sigma (2 parameters).
    assert e1.semi_major == pytest.approx(math.sqrt(2.30 * w[1]), rel=1e-10)
    assert e1.semi_minor == pytest.approx(math.sqrt(2.30 * w[0]), rel=1e-10)
    assert e2.semi_major == pytest.approx(math.sqrt(6.18 * w[1]), rel=1e-10)
    # The major axis is along the eigenvector of the largest eigenvalue (up to sign).
    direction = np.array([math.cos(e1.angle), math.sin(e1.angle)])
    assert abs(direction @ v[:, 1]) == pytest.approx(1.0, rel=1e-10)


def test_delta_chi2_levels_match_chi2_distribution():
    # Two-parameter regions holding the 1-D 1 and 2 sigma probabilities: chi^2_2 quantiles
    # (Press et al. 2007, Sec. 15.6, table of Delta chi^2): 2.30 and 6.18.
    for level, nsig in zip(fc.DELTA_CHI2_2D, (1, 2)):
        p = math.erf(nsig / math.sqrt(2.0))
        assert level == pytest.approx(scipy.stats.chi2.ppf(p, 2), abs=0.01)


def test_ellipse_of_uncorrelated_pair_is_axis_aligned():
    # Diagonal covariance: axes sqrt(2.30)*sigma along the coordinate axes (Coe 2009).
    (e,) = fc.ellipse_parameters(np.diag([4.0, 1.0]), levels=[2.30])
    assert e.semi_major == pytest.approx(2.0 * math.sqrt(2.30))
    assert e.semi_minor == pytest.approx(math.sqrt(2.30))
    assert e.angle == pytest.approx(0.0, abs=1e-12)
    (e,) = fc.ellipse_parameters(np.diag([1.0, 4.0]), levels=[2.30])
    assert abs(e.angle) == pytest.approx(math.pi / 2)


# ----------------------------------------------------- finite-sample factors


@pytest.mark.parametrize("n_sims,n_data", [(100, 10), (1000, 50), (30, 20)])
def test_hartlap_factor_published_formula(n_sims, n_data):
    # Hartlap, Simon & Schneider (2007): (N - p - 2)/(N - 1).
    assert fc.hartlap_factor(n_sims, n_data) == pytest.approx((n_sims - n_data - 2) / (n_sims - 1), rel=1e-14)


def test_hartlap_factor_values():
    # Worked by hand from the Hartlap et al. (2007) formula: 88/99, 948/999.
    assert fc.hartlap_factor(100, 10) == pytest.approx(88 / 99)
    assert fc.hartlap_factor(1000, 50) == pytest.approx(948 / 999)
    with pytest.raises(RaytraceError, match="n_sims"):
        fc.hartlap_factor(12, 10)  # N = p + 2: undefined
    with pytest.raises(RaytraceError):
        fc.hartlap_factor(5, 10)


@pytest.mark.parametrize("n_sims,n_data,n_params", [(100, 10, 3), (1000, 50, 3), (200, 30, 5), (40, 20, 2)])
def test_dodelson_schneider_factor_published_formula(n_sims, n_data, n_params):
    # Dodelson & Schneider (2013): 1 + B (N_b - N_p), B = (N_s-N_b-2)/((N_s-N_b-1)(N_s-N_b-4)).
    n, p = n_sims, n_data
    b = (n - p - 2) / ((n - p - 1) * (n - p - 4))
    assert fc.dodelson_schneider_factor(n, p, n_params) == pytest.approx(1 + b * (p - n_params), rel=1e-14)


def test_dodelson_schneider_factor_values_and_limits():
    # N=100, p=10, 3 params: B = 88/(89*86), factor = 1 + 7*88/7654 (by hand from the formula).
    assert fc.dodelson_schneider_factor(100, 10, 3) == pytest.approx(1 + 7 * 88 / (89 * 86))
    # Dodelson & Schneider (2013) abstract: factor ~ 1 + N_b/N_s for N_s >> N_b.
    assert fc.dodelson_schneider_factor(100_000, 100, 1) == pytest.approx(1 + 100 / 100_000, rel=2e-3)
    # As many parameters as data: no inflation (the fit is exact).
    assert fc.dodelson_schneider_factor(100, 5, 5) == pytest.approx(1.0)
    with pytest.raises(RaytraceError, match="n_sims"):
        fc.dodelson_schneider_factor(14, 10, 2)


def test_check_sample_size_warns_below_threshold():
    # Threshold 0.8 is this package's choice (documented in check_sample_size).
    with pytest.warns(UserWarning, match="Hartlap factor"):
        h = fc.check_sample_size(50, 20)
    assert h == pytest.approx(28 / 49)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        assert fc.check_sample_size(1000, 20) == pytest.approx(978 / 999)
    with pytest.raises(RaytraceError, match="n_sims=21"):
        fc.check_sample_size(21, 20)


# ------------------------------------------------------------- combinations


@pytest.mark.parametrize("seed", range(6))
def test_combination_never_weaker_than_parts(seed):
    """Information inequality: F_joint - F_part is positive semi-definite (Cramér-Rao;
    e.g. Tegmark, Taylor & Heavens 1997, Sec. 2), so joint marginalised errors are smaller."""
    rng = np.random.default_rng(100 + seed)
    n_a, n_b, k = 6, 5, 3
    labels = two_stat_labels(n_a, n_b)
    cov = random_spd(rng, n_a + n_b, cond_floor=0.05)  # strong cross-correlations
    corr = cov / np.sqrt(np.outer(np.diag(cov), np.diag(cov)))
    assert np.max(np.abs(corr[:n_a, n_a:])) > 0.2  # the parts are correlated
    jac = rng.normal(size=(k, n_a + n_b))
    res = fc.forecast_combinations(jac, cov, None, labels, ["power_spectrum", "peaks", "all"])
    names = [r.name for r in res]
    assert names == ["power_spectrum", "peaks", "all"]
    ps, pk, both = res
    assert both.n_data == n_a + n_b and ps.n_data == n_a and pk.n_data == n_b
    assert np.all(both.marginalised <= ps.marginalised * (1 + 1e-10))
    assert np.all(both.marginalised <= pk.marginalised * (1 + 1e-10))
    assert np.all(both.conditional <= np.minimum(ps.conditional, pk.conditional) * (1 + 1e-10))
    # Conditional errors never exceed marginalised ones (Cramér-Rao, TTH97).
    for r in res:
        assert np.all(r.conditional <= r.marginalised * (1 + 1e-10))
    # Joint Fisher minus a part's is positive semi-definite.
    assert np.min(np.linalg.eigvalsh(both.fisher - ps.fisher)) > -1e-10 * np.max(np.abs(both.fisher))


def test_combination_selection_and_names():
    labels = two_stat_labels(3, 2)
    assert fc.select_combination(labels, "all").all()
    np.testing.assert_array_equal(fc.select_combination(labels, ["peaks"]), [0, 0, 0, 1, 1])
    assert fc.combination_statistics("peaks+power_spectrum", labels) == ("power_spectrum", "peaks")
    assert fc.combination_name(["power_spectrum", "peaks"]) == "power_spectrum+peaks"
    with pytest.raises(RaytraceError, match="forecast.combinations.*minkowski"):
        fc.select_combination(labels, ["minkowski"])


def test_scale_cuts_select_ell_and_threshold_ranges():
    labels = fc.make_labels(
        ["power_spectrum"] * 4 + ["peaks"] * 4,
        "z1.00",
        [0.0] * 4 + [1.0, 1.0, 2.0, 2.0],
        [100.0, 500.0, 1000.0, 5000.0, -1.0, 2.0, -1.0, 2.0],
    )
    keep = fc.scale_cut_mask(
        labels,
        {"power_spectrum": {"min": 300, "max": 3000}, "peaks": {"min": 0.0, "smoothing_arcmin": [2.0]}},
    )
    np.testing.assert_array_equal(keep, [0, 1, 1, 0, 0, 0, 0, 1])
    with pytest.raises(RaytraceError, match="forecast.scale_cuts.peaks"):
        fc.scale_cut_mask(labels, {"peaks": {"lmax": 3}})
    with pytest.raises(RaytraceError, match="forecast.scale_cuts.power_spectrum"):
        fc.scale_cut_mask(labels, {"power_spectrum": {"min": 10, "max": 1}})
    with pytest.warns(UserWarning, match="forecast.scale_cuts.voids"):
        fc.scale_cut_mask(labels, {"voids": {"min": 0}})


def test_scale_cut_changes_fisher_like_removing_elements():
    rng = np.random.default_rng(6)
    _, jac, cov = linear_model(rng, n_data=8)
    labels = fc.make_labels("power_spectrum", "z1.00", 0.0, np.geomspace(100, 5000, 8))
    cut = {"power_spectrum": {"max": 2000.0}}
    res = fc.forecast(jac, cov, None, labels, "all", scale_cuts=cut)
    keep = labels["center"] <= 2000.0
    sub = jac[:, keep] @ np.linalg.inv(cov[np.ix_(keep, keep)]) @ jac[:, keep].T  # TTH97 on the kept elements
    np.testing.assert_allclose(res.fisher, sub, rtol=1e-10)
    assert res.n_data == int(keep.sum())


def test_survey_area_scaling():
    rng = np.random.default_rng(7)
    _, jac, cov = linear_model(rng)
    f_map = fc.fisher_matrix(jac, cov, None)
    f_survey = fc.fisher_matrix(jac, cov, None, map_area=12.25, survey_area=5000.0)
    # C_survey = C_map A_map / A_survey (common practice) => F scales by A_survey / A_map.
    np.testing.assert_allclose(f_survey, f_map * 5000.0 / 12.25, rtol=1e-12)
    m_map, _ = fc.parameter_errors(f_map)
    m_survey, _ = fc.parameter_errors(f_survey)
    np.testing.assert_allclose(m_survey, m_map * math.sqrt(12.25 / 5000.0), rtol=1e-10)
    with pytest.raises(RaytraceError, match="forecast.survey_area"):
        fc.fisher_matrix(jac, cov, None, map_area=12.25)
    with pytest.raises(RaytraceError, match="forecast.map_area"):
        fc.fisher_matrix(jac, cov, None, map_area=-1.0, survey_area=10.0)


def test_ds_factor_reported_in_forecast():
    rng = np.random.default_rng(8)
    _, jac, cov = linear_model(rng, n_data=8, n_params=3)
    labels = fc.make_labels("power_spectrum", "z1.00", 0.0, np.arange(8.0))
    res = fc.forecast(jac, cov, 200, labels, parameters=["M_nu", "Omega_m", "A_s"])
    # Dodelson & Schneider (2013): variance x [1 + B (p - n_params)].
    b = (200 - 8 - 2) / ((200 - 8 - 1) * (200 - 8 - 4))
    np.testing.assert_allclose(res.marginalised_ds, res.marginalised * math.sqrt(1 + b * (8 - 3)), rtol=1e-12)
    np.testing.assert_allclose(res.conditional_ds, res.conditional * math.sqrt(1 + b * (8 - 1)), rtol=1e-12)
    # Hartlap (2007) factor is applied: F = h J^T C^-1 J.
    h = (200 - 8 - 2) / 199
    np.testing.assert_allclose(res.fisher, h * jac @ np.linalg.inv(cov) @ jac.T, rtol=1e-10)


def test_ds_factor_undefined_gives_nan_with_warning():
    rng = np.random.default_rng(23)
    _, jac, cov = linear_model(rng, n_data=8, n_params=2)
    labels = fc.make_labels("power_spectrum", "z1.00", 0.0, np.arange(8.0))
    # N = p + 4: Hartlap factor 2/11 is defined, B of Dodelson & Schneider (2013) is not.
    with pytest.warns(UserWarning, match="Hartlap factor of 0.182"):
        with pytest.warns(UserWarning, match="Dodelson-Schneider"):
            res = fc.forecast(jac, cov, 12, labels)
    assert np.all(np.isfinite(res.marginalised))
    assert np.all(np.isnan(res.marginalised_ds))


# --------------------------------------------------------------------- priors


def test_tight_prior_pins_parameter():
    rng = np.random.default_rng(9)
    _, jac, cov = linear_model(rng, n_params=3)
    names = ["M_nu", "Omega_m", "A_s"]
    f0 = fc.fisher_matrix(jac, cov, None)
    f = fc.fisher_matrix(jac, cov, None, prior_sigma={"Omega_m": 1e-8}, parameters=names)
    marg, _ = fc.parameter_errors(f)
    assert marg[1] == pytest.approx(1e-8, rel=1e-6)
    # Pinning Omega_m = marginalising over the other two only (Coe 2009: fix = drop row/column).
    keep = [0, 2]
    expected = np.sqrt(np.diag(np.linalg.inv(f0[np.ix_(keep, keep)])))
    np.testing.assert_allclose(marg[keep], expected, rtol=1e-6)
    # Prior adds 1/sigma^2 to the diagonal (Coe 2009).
    f2 = fc.fisher_matrix(jac, cov, None, prior_sigma=[None, 0.5, np.inf])
    np.testing.assert_allclose(f2 - f0, np.diag([0.0, 4.0, 0.0]), atol=1e-12)


def test_prior_by_unknown_name_is_an_error():
    rng = np.random.default_rng(10)
    _, jac, cov = linear_model(rng, n_params=2)
    with pytest.raises(RaytraceError, match="forecast.priors.sigma.h0"):
        fc.fisher_matrix(jac, cov, None, prior_sigma={"h0": 0.1}, parameters=["a", "b"])
    with pytest.raises(RaytraceError, match="forecast.priors.sigma.a"):
        fc.fisher_matrix(jac, cov, None, prior_sigma={"a": -0.1}, parameters=["a", "b"])


@pytest.mark.parametrize("suffix", [".npy", ".txt", ".csv"])
def test_prior_fisher_file_is_read(tmp_path, suffix):
    rng = np.random.default_rng(11)
    _, jac, cov = linear_model(rng, n_params=3)
    prior = random_spd(rng, 3)
    path = tmp_path / f"prior{suffix}"
    if suffix == ".npy":
        np.save(path, prior)
    else:
        np.savetxt(path, prior, delimiter="," if suffix == ".csv" else " ")
    f0 = fc.fisher_matrix(jac, cov, None)
    f = fc.fisher_matrix(jac, cov, None, prior_fisher=path)
    # Independent Gaussian information adds (Coe 2009).
    np.testing.assert_allclose(f, f0 + prior, rtol=1e-9)
    f_arr = fc.fisher_matrix(jac, cov, None, prior_fisher=prior)
    np.testing.assert_allclose(f_arr, f, rtol=1e-9)


def test_prior_fisher_csv_with_header_is_reordered(tmp_path):
    path = tmp_path / "planck_prior.csv"
    path.write_text("# prior\nA_s,M_nu\n4.0,1.0\n1.0,9.0\n")
    prior = fc.load_prior_fisher(path, 2, ["M_nu", "A_s"])
    np.testing.assert_allclose(prior, [[9.0, 1.0], [1.0, 4.0]])


def test_bad_prior_files_name_the_file(tmp_path):
    wrong_shape = tmp_path / "wrong_shape.txt"
    np.savetxt(wrong_shape, np.eye(2))
    with pytest.raises(RaytraceError, match="wrong_shape.txt"):
        fc.load_prior_fisher(wrong_shape, 3)
    garbage = tmp_path / "garbage.csv"
    garbage.write_text("1,2,x\n3,4,5\n6,7,8\n")
    with pytest.raises(RaytraceError, match="garbage.csv"):
        fc.load_prior_fisher(garbage, 3)
    asym = tmp_path / "asym.npy"
    np.save(asym, np.array([[1.0, 0.5], [0.0, 1.0]]))
    with pytest.raises(RaytraceError, match="asym.npy.*symmetric"):
        fc.load_prior_fisher(asym, 2)
    negative = tmp_path / "negative.npy"
    np.save(negative, np.diag([1.0, -1.0]))
    with pytest.raises(RaytraceError, match="negative.npy.*positive"):
        fc.load_prior_fisher(negative, 2)
    with pytest.raises(RaytraceError, match="missing.npy"):
        fc.load_prior_fisher(tmp_path / "missing.npy", 2)
    bad_suffix = tmp_path / "prior.json"
    bad_suffix.write_text("[]")
    with pytest.raises(RaytraceError, match="prior.json"):
        fc.load_prior_fisher(bad_suffix, 2)
    rng = np.random.default_rng(12)
    _, jac, cov = linear_model(rng, n_params=3)
    with pytest.raises(RaytraceError, match="wrong_shape.txt"):
        fc.fisher_matrix(jac, cov, None, prior_fisher=wrong_shape)


def test_degenerate_fisher_without_prior_is_an_error():
    jac = np.array([[1.0, 2.0, 3.0], [2.0, 4.0, 6.0]])  # two parameters, same response
    f = fc.fisher_matrix(jac, np.eye(3), None)
    with pytest.raises(RaytraceError, match="forecast.priors"):
        fc.parameter_errors(f, ["M_nu", "A_s"])
    marg, _ = fc.parameter_errors(fc.fisher_matrix(jac, np.eye(3), None, prior_sigma=[0.1, None]))
    assert np.all(np.isfinite(marg))


# ---------------------------------------------------------------- derivatives


def _quadratic_tables(rng, n_real=20, n_data=5, pair=True):
    """d(p) = a + b p + c p^2 + noise, with the same noise per seed when ``pair``."""
    a, b, c = rng.normal(size=(3, n_data))
    labels = fc.make_labels("peaks", "z1.00", 2.0, np.linspace(0, 3, n_data))
    seeds = np.arange(n_real)

    def table(p, name):
        noise = rng.normal(size=(n_real, n_data)) if not pair else base_noise
        return fc.DataTable(a + b * p + c * p**2 + noise, labels, seeds, name)

    base_noise = rng.normal(size=(n_real, n_data))
    return {"fid": table(0.3, "fid"), "hi": table(0.4, "hi"), "lo": table(0.2, "lo")}, (a, b, c)


def test_central_difference_exact_for_quadratic_and_paired_noise_cancels():
    rng = np.random.default_rng(13)
    tables, (a, b, c) = _quadratic_tables(rng)
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # central: no warning
        der = fc.derivatives(tables, {"Omega_m": {"plus": ("hi", 0.4), "minus": ("lo", 0.2)}}, ("fid", {"Omega_m": 0.3}))
    assert der.kind == ["central"]
    # Central difference of a quadratic is exact: b + 2 c p0 (Press et al. 2007, Sec. 5.7).
    np.testing.assert_allclose(der.mean[0], b + 2 * c * 0.3, rtol=1e-9, atol=1e-12)
    # Paired realisations: identical noise cancels in every pair, so the scatter vanishes.
    assert np.max(der.scatter) < 1e-10
    assert der.samples[0].shape == (20, 5)


def test_unpaired_noise_does_not_cancel():
    rng = np.random.default_rng(14)
    tables, (a, b, c) = _quadratic_tables(rng, n_real=400, pair=False)
    der = fc.derivatives(tables, {"Omega_m": {"plus": ("hi", 0.4), "minus": ("lo", 0.2)}}, "fid")
    # Independent unit noise on both sides: per-pair scatter sqrt(2)/(p+ - p-) (propagation of errors).
    expected = math.sqrt(2.0) / 0.2
    np.testing.assert_allclose(der.scatter[0], expected, rtol=0.15)
    # The mean still estimates the true derivative within its standard error (5 sigma).
    assert np.all(np.abs(der.mean[0] - (b + 0.6 * c)) < 5 * der.standard_error[0])


def test_one_sided_derivative_warns_and_uses_fiducial():
    rng = np.random.default_rng(15)
    tables, (a, b, c) = _quadratic_tables(rng)
    fid = ("fid", {"M_nu": 0.3})
    with pytest.warns(UserWarning, match="one-sided"):
        der = fc.derivatives(tables, {"M_nu": {"plus": ("hi", 0.4)}}, fid)
    assert der.kind == ["forward"]
    # Forward difference of a quadratic: b + c (2 p0 + h) (Taylor expansion, Press et al. 2007).
    np.testing.assert_allclose(der.mean[0], b + c * (0.6 + 0.1), rtol=1e-9, atol=1e-12)
    with pytest.warns(UserWarning, match="one-sided"):
        der = fc.derivatives(tables, {"M_nu": {"minus": {"model": "lo", "value": 0.2}}}, fid)
    assert der.kind == ["backward"]
    np.testing.assert_allclose(der.mean[0], b + c * (0.6 - 0.1), rtol=1e-9, atol=1e-12)
    with pytest.raises(RaytraceError, match="fiducial.values.M_nu"):
        fc.derivatives(tables, {"M_nu": {"plus": ("hi", 0.4)}}, "fid")


def test_derivative_input_errors():
    rng = np.random.default_rng(16)
    tables, _ = _quadratic_tables(rng)
    with pytest.raises(RaytraceError, match="forecast.derivatives.M_nu.plus"):
        fc.derivatives(tables, {"M_nu": {"plus": ("nowhere", 0.4), "minus": ("lo", 0.2)}}, "fid")
    with pytest.raises(RaytraceError, match="forecast.derivatives.M_nu"):
        fc.derivatives(tables, {"M_nu": {"plus": ("lo", 0.2), "minus": ("hi", 0.4)}}, "fid")
    other = dict(tables)
    other["hi"] = fc.DataTable(tables["hi"].values, fc.make_labels("peaks", "z2.00", 2.0, np.linspace(0, 3, 5)), None, "hi")
    with pytest.raises(RaytraceError, match="differ"):
        fc.derivatives(other, {"M_nu": {"plus": ("hi", 0.4), "minus": ("lo", 0.2)}}, "fid")


def test_pairing_by_seed_reorders_and_drops_unshared():
    rng = np.random.default_rng(17)
    labels = fc.make_labels("peaks", "z1.00", 2.0, [0.0, 1.0])
    noise = rng.normal(size=(6, 2))
    lo = fc.DataTable(noise, labels, np.arange(6), "lo")
    perm = np.array([5, 3, 1, 0, 2])  # seeds 0..5 minus 4, shuffled
    hi = fc.DataTable(noise[perm] + 2.0, labels, perm, "hi")
    with pytest.warns(UserWarning, match="only 5 realisations"):
        der = fc.derivatives({"lo": lo, "hi": hi, "fid": lo}, {"x": {"plus": ("hi", 1.0), "minus": ("lo", 0.0)}}, "fid")
    # Same seeds => noise cancels exactly after matching: derivative 2 per unit step.
    np.testing.assert_allclose(der.samples[0], 2.0, rtol=1e-12)
    assert der.n_pairs == [5]


# ---------------------------------------------------------------- diagnostics


def test_stability_diagnostics_on_linear_model():
    rng = np.random.default_rng(18)
    n_data, n_sims = 6, 600
    d0, jac, cov = linear_model(rng, n_data=n_data, n_params=2)
    chol = np.linalg.cholesky(cov)
    labels = fc.make_labels("power_spectrum", "z1.00", 0.0, np.arange(n_data) + 1.0)
    seeds = np.arange(n_sims)
    fid_noise = rng.normal(size=(n_sims, n_data)) @ chol.T
    tables = {"fid": fc.DataTable(d0 + fid_noise, labels, seeds, "fid")}
    spec = {}
    for a, name in enumerate(["M_nu", "A_s"]):
        # Independent noise per step model: noisy derivatives by construction.
        for side, sign in (("plus", 1), ("minus", -1)):
            shift = sign * 0.5 * jac[a]
            tables[f"{name}{side}"] = fc.DataTable(
                d0 + shift + 0.05 * rng.normal(size=(n_sims, n_data)) @ chol.T, labels, seeds, name + side
            )
        spec[name] = {"plus": (f"{name}plus", 0.5), "minus": (f"{name}minus", -0.5)}
    der = fc.derivatives(tables, spec, "fid")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        diag = fc.stability_diagnostics(tables["fid"], der, labels, tolerance=0.5)
    assert diag.half_covariance.shape == (2, 2) and diag.half_derivatives.shape == (2, 2)
    assert np.all(np.isfinite(diag.half_covariance)) and np.all(np.isfinite(diag.half_derivatives))
    # Half of 600 sims with p=6: fractional error scatter ~ sqrt(2/(N/2-p-4))/2 ~ 4 %
    # (Taylor, Joachimi & Kitching 2013), so the change stays within 20 %.
    assert np.all(diag.covariance_change < 0.2)
    assert np.all(diag.derivative_change < 0.2)


def test_stability_diagnostics_warns_on_unconverged_derivatives():
    rng = np.random.default_rng(19)
    n_data, n_sims = 4, 200
    labels = fc.make_labels("peaks", "z1.00", 1.0, np.arange(n_data) + 0.0)
    seeds = np.arange(n_sims)
    base = rng.normal(size=(n_sims, n_data))
    tables = {"fid": fc.DataTable(base, labels, seeds, "fid")}
    # Tiny signal, huge independent noise: the derivative is pure noise.
    tables["p"] = fc.DataTable(1e-3 + 30 * rng.normal(size=(n_sims, n_data)), labels, seeds, "p")
    tables["m"] = fc.DataTable(30 * rng.normal(size=(n_sims, n_data)), labels, seeds, "m")
    der = fc.derivatives(tables, {"x": {"plus": ("p", 1.0), "minus": ("m", 0.0)}}, "fid")
    with pytest.warns(UserWarning, match="half of the derivative pairs"):
        fc.stability_diagnostics(tables["fid"], der, labels, tolerance=0.1)


def test_forecast_warns_when_sims_are_few():
    rng = np.random.default_rng(20)
    _, jac, cov = linear_model(rng, n_data=8)
    labels = fc.make_labels("power_spectrum", "z1.00", 0.0, np.arange(8.0))
    with pytest.warns(UserWarning, match="Hartlap factor"):
        fc.forecast(jac, cov, 30, labels)  # h = 20/29 < 0.8
    with pytest.raises(RaytraceError, match="all: n_sims=10"):
        fc.forecast(jac, cov, 10, labels)  # N <= p + 2 is fatal


# -------------------------------------------------------------- table, plot


def test_error_table_csv(tmp_path):
    rng = np.random.default_rng(21)
    labels = two_stat_labels(4, 3)
    cov = random_spd(rng, 7)
    jac = rng.normal(size=(2, 7))
    res = fc.forecast_combinations(jac, cov, 500, labels, ["power_spectrum", "all"], parameters=["M_nu", "A_s"])
    out = fc.write_error_table(tmp_path / "sub" / "errors.csv", res)
    rows = list(csv.DictReader(open(out)))
    assert [r["combination"] for r in rows] == ["power_spectrum", "power_spectrum", "all", "all"]
    assert rows[0].keys() >= {"parameter", "combination", "marginalised", "conditional", "marginalised_ds", "conditional_ds"}
    assert float(rows[3]["marginalised"]) == pytest.approx(res[1].marginalised[1], rel=1e-7)
    assert float(rows[3]["marginalised_ds"]) > float(rows[3]["marginalised"])
    with pytest.raises(RaytraceError, match="errors.csv"):
        fc.write_error_table(out / "errors.csv", res)  # parent is a file, not a directory


def test_plot_fisher_ellipses_writes_png(tmp_path):
    from raytrace.plots import plot_fisher_ellipses

    rng = np.random.default_rng(22)
    labels = two_stat_labels(5, 4)
    cov = random_spd(rng, 9)
    jac = rng.normal(size=(3, 9))
    names = ["M_nu", "Omega_m", "A_s"]
    res = fc.forecast_combinations(jac, cov, None, labels, ["power_spectrum", "peaks", "all"], parameters=names)
    out = plot_fisher_ellipses(res, names, {"M_nu": 0.1, "Omega_m": 0.3, "A_s": 2.1}, tmp_path / "ellipses.png")
    data = out.read_bytes()
    assert data[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature (PNG specification, ISO/IEC 15948)
    assert len(data) > 5000
    with pytest.raises(RaytraceError, match="forecast.fiducial"):
        plot_fisher_ellipses(res, names, {"M_nu": 0.1}, tmp_path / "x.png")
