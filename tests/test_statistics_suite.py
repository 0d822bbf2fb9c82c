"""Checks of the non-Gaussian summary statistics against Gaussian-field theory and
perturbative predictions for weakly non-Gaussian fields.

Fields are built on periodic grids with known power spectra, with seeded generators.
Theory values quoted from papers were transcribed from memory; where a formula is
transcribed, a self-consistency check of the transcription (e.g. its normalisation) is
made alongside.
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.fft
import scipy.integrate
from scipy.special import erf, erfc, eval_hermitenorm, factorial

from raytrace.errors import RaytraceError
from raytrace.statistics import MapSet, build
from raytrace.statistics.bispectrum import (
    bin_mean_ell,
    configuration_triples,
    shell_fields,
    transform_size,
    triangle_counts,
)
from raytrace.statistics.moments import MOMENT_NAMES, analysis_mask, spectral_derivatives
from raytrace.statistics.peaks import eligible_pixels, local_extrema

PIX_ARCMIN = 1.0
PIX_RAD = np.deg2rad(PIX_ARCMIN / 60.0)


# --------------------------------------------------------------------------------------
# field generation and spectral moments of the generating spectrum
# --------------------------------------------------------------------------------------
def _k2_grid(n: int) -> np.ndarray:
    """|k|^2 in rad^2 per pixel^2 (k in radians per pixel) on the rfft2 grid."""
    ky = 2 * np.pi * scipy.fft.fftfreq(n)
    kx = 2 * np.pi * scipy.fft.rfftfreq(n)
    return ky[:, None] ** 2 + kx[None, :] ** 2


def gaussian_smoothed_field(rng, n: int, s_pix: float) -> np.ndarray:
    """White noise smoothed by a Gaussian of width ``s_pix`` pixels: P(k) ~ exp(-k^2 s^2).

    Normalised to zero mean and unit rms over the map."""
    w = scipy.fft.rfft2(rng.standard_normal((n, n)))
    w *= np.exp(-0.5 * _k2_grid(n) * s_pix**2)
    w[0, 0] = 0.0
    f = scipy.fft.irfft2(w, s=(n, n))
    return f / f.std()


def spectral_sigmas(n: int, s_pix: float) -> tuple[float, float, float]:
    """sigma0^2, sigma1^2, sigma2^2 (pixel units) of the spectrum exp(-k^2 s^2) on the grid,
    as weighted sums over the discrete modes (definition of the spectral moments)."""
    k2 = _k2_grid(n)
    p = np.exp(-k2 * s_pix**2)
    p[0, 0] = 0.0
    w = np.full(n // 2 + 1, 2.0)
    w[0] = 1.0
    w[-1] = 1.0
    p = p * w[None, :]
    return float(p.sum()), float((p * k2).sum()), float((p * k2**2).sum())


def mapset(maps, mask=None, smoothing=0.0, noise=None) -> MapSet:
    maps = np.asarray(maps, dtype=float)
    if maps.ndim == 2:
        maps = maps[None]
    if mask is None:
        mask = np.ones(maps.shape[1:], dtype=bool)
    return MapSet(
        maps=maps,
        mask=mask,
        pixel_arcmin=PIX_ARCMIN,
        smoothing_arcmin=smoothing,
        noise_sigma=noise,
        bin_labels=tuple(f"r{i}" for i in range(maps.shape[0])),
    )


# --------------------------------------------------------------------------------------
# Gaussian-field theory
# --------------------------------------------------------------------------------------
def bond_efstathiou_peak_density(nu, gamma, theta_star):
    """Differential 2-D peak density n_pk(nu) per unit area and unit nu.

    Bond & Efstathiou (1987, MNRAS 226, 655), 2-D Gaussian field (from memory):
    n = exp(-nu^2/2) G(gamma, gamma nu) / ((2 pi)^{3/2} theta*^2)."""
    x = gamma * nu
    g2 = 1.0 - gamma**2
    a = 3.0 - 2.0 * gamma**2
    big_g = (
        (x**2 - gamma**2) * (1.0 - 0.5 * erfc(x / np.sqrt(2.0 * g2)))
        + x * g2 / np.sqrt(2.0 * np.pi * g2) * np.exp(-(x**2) / (2.0 * g2))
        + np.exp(-(x**2) / a) / np.sqrt(a) * (1.0 - 0.5 * erfc(x / np.sqrt(2.0 * g2 * a)))
    )
    return np.exp(-0.5 * nu**2) * big_g / ((2.0 * np.pi) ** 1.5 * theta_star**2)


def bin_average(func, edges):
    return np.array([scipy.integrate.quad(func, lo, hi)[0] / (hi - lo) for lo, hi in zip(edges[:-1], edges[1:])])


def tomita_minkowski(edges, sigma0, sigma1):
    """Bin-averaged Gaussian-field Minkowski functionals in 2-D (Tomita 1986, Prog. Theor.
    Phys. 76, 952; normalisation of Schmalzing & Buchert 1997; from memory)."""
    r = sigma1 / (np.sqrt(2.0) * sigma0)
    v0 = bin_average(lambda x: 0.5 * erfc(x / np.sqrt(2)), edges)
    v1 = bin_average(lambda x: r / 8.0 * np.exp(-0.5 * x**2), edges)
    v2 = bin_average(lambda x: r**2 / (2 * np.pi) ** 1.5 * x * np.exp(-0.5 * x**2), edges)
    return v0, v1, v2


# --------------------------------------------------------------------------------------
# peaks and minima
# --------------------------------------------------------------------------------------
S_PEAK = 4.0  # smoothing width in pixels: discrete-pixel effects at the per-cent level
N_PEAK = 512
R_PEAK = 64  # ~47000 peaks


@pytest.fixture(scope="module")
def peak_fields():
    rng = np.random.default_rng(20240601)
    return np.array([gaussian_smoothed_field(rng, N_PEAK, S_PEAK) for _ in range(R_PEAK)])


def test_bond_efstathiou_transcription_normalisation():
    # Bond & Efstathiou (1987): the total 2-D peak density is 1/(4 sqrt(3) pi theta*^2);
    # the integral of the transcribed differential density must reproduce it for any gamma.
    for gamma in (0.3, 1 / np.sqrt(2), 0.9):
        total = scipy.integrate.quad(lambda x: bond_efstathiou_peak_density(x, gamma, 1.0), -12, 12)[0]
        assert total == pytest.approx(1.0 / (4.0 * np.sqrt(3.0) * np.pi), rel=1e-6)


@pytest.mark.parametrize("gamma", [0.5, 1 / np.sqrt(2), 0.8])
def test_transcriptions_agree_at_high_threshold(gamma):
    # Cross-check of the two transcribed formulae: V2 is the Euler characteristic per
    # unit area, which at high thresholds counts the isolated excursions, i.e. the peaks
    # above the threshold (Adler 1981, The Geometry of Random Fields): the tail integral
    # of the Bond & Efstathiou density must approach Tomita's V2 (the difference falls
    # off quickly with nu; below 0.1% at nu = 7 for gamma >= 0.5).
    s0, s1 = 1.0, 1.0
    s2 = s1**2 / (gamma * s0)
    theta_star = np.sqrt(2.0) * s1 / s2
    nu = 7.0
    density = lambda x: bond_efstathiou_peak_density(x, gamma, theta_star)
    tail = scipy.integrate.quad(density, nu, 40.0, epsabs=0.0, epsrel=1e-10)[0]
    v2 = tomita_minkowski(np.array([nu - 1e-4, nu + 1e-4]), s0, s1)[2][0]
    assert tail == pytest.approx(v2, rel=1e-3)


@pytest.mark.parametrize("name", ["peaks", "minima"])
def test_extrema_match_bond_efstathiou(peak_fields, name):
    s0, s1, s2 = spectral_sigmas(N_PEAK, S_PEAK)
    gamma = s1 / np.sqrt(s0 * s2)
    theta_star = np.sqrt(2.0 * s1 / s2)  # pixels
    edges = np.array([-1.0, 0.0, 0.5, 1.0, 1.5, 2.0, 2.5, 3.0, 4.5])
    if name == "minima":
        edges = -edges[::-1]
    m = build(name, {"binning": "nu", "edges": edges.tolist()}).measure(mapset(peak_fields, smoothing=S_PEAK))
    per_pix2 = (PIX_ARCMIN / 60.0) ** 2  # deg^2 per pixel
    measured = m.values.mean(axis=0) * per_pix2  # per pixel^2 per bin
    sign = 1.0 if name == "peaks" else -1.0  # minima at nu are peaks at -nu (symmetry)
    expected = np.array(
        [
            scipy.integrate.quad(lambda x: bond_efstathiou_peak_density(sign * x, gamma, theta_star), lo, hi)[0]
            for lo, hi in zip(edges[:-1], edges[1:])
        ]
    )
    # total density: Bond & Efstathiou (1987), 1/(4 sqrt(3) pi theta*^2)
    total = m.extra["total_all_heights"][:, 0].sum() / (m.extra["area_deg2"][:, 0].sum() / per_pix2)
    assert total == pytest.approx(1.0 / (4.0 * np.sqrt(3.0) * np.pi * theta_star**2), rel=0.05)
    # height distribution within 5% in every bin whose Poisson error is below 2%
    # (expected count above 2500; common practice for a 5% check)
    n_expected = expected / per_pix2 * m.extra["area_deg2"][:, 0].sum()
    big = n_expected > 2500
    assert big.sum() >= 5
    np.testing.assert_allclose(measured[big], expected[big], rtol=0.05)


def test_peaks_mask_area_and_exclusion(peak_fields):
    field = peak_fields[0]
    mask = np.ones_like(field, dtype=bool)
    mask[100:300, 50:250] = False  # a 200 x 200 hole
    mask[400:, 400:] = False  # a corner
    settings = {"binning": "nu", "min": -5.0, "max": 8.0, "bins": 13}
    full = build("peaks", settings).measure(mapset(field))
    cut = build("peaks", settings).measure(mapset(field, mask))
    area_full = full.extra["area_deg2"][0, 0]
    area_cut = cut.extra["area_deg2"][0, 0]
    # usable area = pixels off the map edge with a fully valid 3x3 block (definition)
    per_pix = (PIX_ARCMIN / 60.0) ** 2
    assert area_full == pytest.approx((N_PEAK - 2) ** 2 * per_pix)
    hole = (200 + 2) ** 2 + 112**2  # hole grown by one pixel; corner rows/cols 399..510
    assert area_cut == pytest.approx(((N_PEAK - 2) ** 2 - hole) * per_pix)
    # counts drop in proportion to the valid area (homogeneous field; Poisson-level
    # agreement, ~2% for ~1700 peaks) -- common practice
    n_full = full.extra["total_all_heights"][0, 0]
    n_cut = cut.extra["total_all_heights"][0, 0]
    assert n_cut / n_full == pytest.approx(area_cut / area_full, rel=0.06)
    # exactly the unmasked-map peaks whose 3x3 block is valid survive (definition)
    peaks_full = local_extrema(field, eligible_pixels(np.ones_like(mask)), "max")
    assert n_cut == np.sum(peaks_full & eligible_pixels(mask))


def test_peak_next_to_mask_is_excluded():
    n = 64
    y, x = np.mgrid[0:n, 0:n]
    bump = lambda cy, cx: np.exp(-((y - cy) ** 2 + (x - cx) ** 2) / (2 * 2.0**2))
    field = bump(20, 20) + bump(44, 44)  # two isolated maxima, height ~1
    mask = np.ones((n, n), dtype=bool)
    settings = {"binning": "kappa", "edges": [0.5, 1.5]}
    assert build("peaks", settings).measure(mapset(field, mask)).extra["counts"][0, 0] == 2
    mask[21, 21] = False  # diagonal neighbour of the first maximum
    assert build("peaks", settings).measure(mapset(field, mask)).extra["counts"][0, 0] == 1
    mask[:] = True
    mask[22, 20] = False  # two pixels away: the 3x3 block is intact
    assert build("peaks", settings).measure(mapset(field, mask)).extra["counts"][0, 0] == 2
    # a maximum on the map edge is not a peak
    edge = bump(0, 30)
    assert build("peaks", settings).measure(mapset(edge)).extra["counts"][0, 0] == 0
    # the minimum of -field behaves the same way (definition of a minimum)
    m = build("minima", {"binning": "kappa", "edges": [-1.5, -0.5]}).measure(mapset(-field))
    assert m.extra["counts"][0, 0] == 2


# --------------------------------------------------------------------------------------
# Minkowski functionals, PDF, moments
# --------------------------------------------------------------------------------------
S_MF = 4.0
N_MF = 512
R_MF = 8


@pytest.fixture(scope="module")
def mf_fields():
    rng = np.random.default_rng(31415)
    return np.array([gaussian_smoothed_field(rng, N_MF, S_MF) for _ in range(R_MF)])


def test_minkowski_match_tomita(mf_fields):
    edges = np.linspace(-3.0, 3.0, 13)
    m = build("minkowski", {"binning": "nu", "edges": edges.tolist()}).measure(mapset(mf_fields, smoothing=S_MF))
    n = len(mf_fields)
    v = m.values.reshape(3, n, -1).mean(axis=1)
    s0, s1, _ = spectral_sigmas(N_MF, S_MF)
    theory = tomita_minkowski(edges, np.sqrt(s0), np.sqrt(s1) / PIX_RAD)  # sigma1 per radian
    for k in range(3):
        # bins where the functional is not near zero: above 10% of its peak value
        big = np.abs(theory[k]) > 0.1 * np.abs(theory[k]).max()
        np.testing.assert_allclose(v[k][big], theory[k][big], rtol=0.05, err_msg=f"V{k}")


def _hermite_bin_variance(edges, corr_area, area):
    """Variance of a histogram density bin of a unit Gaussian field: with the Hermite
    expansion of the bin indicator, c_n = [-He_{n-1} phi] between the edges, the
    covariance of the indicators at separation r is sum_n c_n^2 rho(r)^n / n!
    (Mehler's formula), and int rho^n d^2r = corr_area / n for rho = exp(-r^2 / 4s^2)."""
    phi = lambda x: np.exp(-0.5 * x**2) / np.sqrt(2 * np.pi)
    var = np.zeros(len(edges) - 1)
    # The test maps have zero mean (k = 0 mode removed) and unit sample rms, which removes
    # the He_1 and He_2 components of the fluctuation at first order: start at n = 3.
    for n in range(3, 61):
        upper = eval_hermitenorm(n - 1, edges[1:]) * phi(edges[1:])
        lower = eval_hermitenorm(n - 1, edges[:-1]) * phi(edges[:-1])
        c = lower - upper
        var += c**2 / factorial(n) / n
    return var * corr_area / area / np.diff(edges) ** 2


def test_pdf_gaussian(mf_fields):
    edges = np.linspace(-3.5, 3.5, 15)
    m = build("pdf", {"binning": "nu", "edges": edges.tolist()}).measure(mapset(mf_fields, smoothing=S_MF))
    expected = 0.5 * (erf(edges[1:] / np.sqrt(2)) - erf(edges[:-1] / np.sqrt(2))) / np.diff(edges)
    measured = m.values.mean(axis=0)
    # error from the number of independent patches: correlation area 4 pi s^2 of
    # xi ~ exp(-r^2 / 4 s^2) for P(k) ~ exp(-k^2 s^2) (Gaussian integral)
    sigma = np.sqrt(_hermite_bin_variance(edges, 4 * np.pi * S_MF**2, N_MF**2) / len(mf_fields))
    assert np.all(np.abs(measured - expected) < 4 * sigma)
    # the predicted scatter is the real one (realisation-to-realisation), within 40%
    ratio = m.values.std(axis=0, ddof=1)[3:-3] / (sigma[3:-3] * np.sqrt(len(mf_fields)))
    assert np.all((ratio > 0.6) & (ratio < 1.4))
    # density normalisation: sum p dnu = fraction inside the range (definition)
    inside = 1 - m.extra["fraction_outside"][:, 0]
    np.testing.assert_allclose((m.values * np.diff(edges)).sum(axis=1), inside, rtol=1e-12)


def test_moments_gaussian(mf_fields):
    m = build("moments", {}).measure(mapset(mf_fields, smoothing=S_MF))
    n = len(mf_fields)
    vals = {name: m.values[k * n : (k + 1) * n, 0] for k, name in enumerate(MOMENT_NAMES)}
    s0, s1, s2 = spectral_sigmas(N_MF, S_MF)
    # spectral moments of the generating spectrum (definition), per-cent level sample scatter
    ratio1 = np.mean(vals["sigma1_sq"] / vals["sigma0_sq"]) * PIX_RAD**2
    ratio2 = np.mean(vals["sigma2_sq"] / vals["sigma1_sq"]) * PIX_RAD**2
    assert ratio1 == pytest.approx(s1 / s0, rel=0.02)
    assert ratio2 == pytest.approx(s2 / s1, rel=0.02)
    # Gaussian field: skewness and excess kurtosis vanish. Sample variance from the
    # Hermite expansion with the correlation area 4 pi s^2 (see _hermite_bin_variance):
    # var(skewness) = 6 * (4 pi s^2 / 3) / A, var(kurtosis) = 24 * (4 pi s^2 / 4) / A.
    area = float(m.extra["n_pixels"][0, 0])
    sd_skew = np.sqrt(6 * 4 * np.pi * S_MF**2 / 3 / area / n)
    sd_kurt = np.sqrt(24 * 4 * np.pi * S_MF**2 / 4 / area / n)
    assert abs(vals["skewness"].mean()) < 4 * sd_skew
    assert abs(vals["kurtosis"].mean()) < 4 * sd_kurt
    for name in ("S0", "S1", "S2", "K0", "K1", "K2", "K3"):
        # all generalised skewness/kurtosis parameters vanish for a Gaussian field
        # (Matsubara 2003): mean within 4 standard errors of the realisation scatter
        assert abs(vals[name].mean()) < 4 * vals[name].std(ddof=1) / np.sqrt(n), name


@pytest.fixture(scope="module")
def narrow_fields():
    # s = 2 pixels: four times more independent patches than mf_fields; the spectrum is
    # still ~1e-17 of its peak at the Nyquist frequency, so spectral derivatives are exact
    rng = np.random.default_rng(2718)
    return np.array([gaussian_smoothed_field(rng, N_MF, 2.0) for _ in range(R_MF)])


def test_skewness_parameters_local_quadratic(narrow_fields):
    # local quadratic field kappa = phi + f (phi^2 - 1): at leading order in f the three
    # skewness parameters of Matsubara (2003) all equal 6 f (a Gaussian-moment calculation
    # of <k^3>, <k^2 lap k>, <|grad k|^2 lap k>). The Gaussian parts of the estimates are
    # removed by subtracting the same statistic of phi (control variate).
    # Corrections are O(f^2) (~1% here); the residual sample scatter is ~0.5%.
    f = 0.05
    quad = narrow_fields + f * (narrow_fields**2 - 1.0)
    ms_k = build("moments", {"periodic": True}).measure(mapset(quad))
    ms_p = build("moments", {"periodic": True}).measure(mapset(narrow_fields))
    n = len(narrow_fields)
    for name in ("S0", "S1", "S2"):
        k = MOMENT_NAMES.index(name)
        diff = np.mean(ms_k.values[k * n : (k + 1) * n, 0] - ms_p.values[k * n : (k + 1) * n, 0])
        assert diff == pytest.approx(6 * f, rel=0.05), name


def test_spectral_derivatives_exact_on_harmonics():
    # derivative of a band-limited periodic function (definition of Fourier differentiation)
    n = 64
    y, x = np.mgrid[0:n, 0:n] * PIX_RAD
    kx, ky = 2 * np.pi * 3 / (n * PIX_RAD), 2 * np.pi * 5 / (n * PIX_RAD)
    field = np.sin(kx * x) * np.cos(ky * y)
    d = spectral_derivatives(field, PIX_RAD)
    scale = kx * ky
    np.testing.assert_allclose(d["x"], kx * np.cos(kx * x) * np.cos(ky * y), atol=1e-5 * kx)
    np.testing.assert_allclose(d["y"], -ky * np.sin(kx * x) * np.sin(ky * y), atol=1e-5 * ky)
    np.testing.assert_allclose(d["xy"], -scale * np.cos(kx * x) * np.sin(ky * y), atol=1e-5 * scale)
    np.testing.assert_allclose(d["xx"], -(kx**2) * field, atol=1e-5 * kx**2)
    np.testing.assert_allclose(d["yy"], -(ky**2) * field, atol=1e-5 * ky**2)


def test_analysis_mask_margin():
    mask = np.ones((40, 40), dtype=bool)
    mask[20, 20] = False
    use = analysis_mask(mask, 3.0, periodic=True)
    yy, xx = np.mgrid[0:40, 0:40]
    # Euclidean distance to the single masked pixel must exceed the margin (definition)
    np.testing.assert_array_equal(use, np.hypot(yy - 20, xx - 20) > 3.0)
    use = analysis_mask(np.ones((40, 40), dtype=bool), 3.0, periodic=False)
    assert use.sum() == (40 - 6) ** 2


def test_minkowski_mask_unbiased(mf_fields):
    # a mask removes area, not information density: V_k on the rest of the map agree with
    # the unmasked values within the sample scatter (common practice)
    mask = np.ones((N_MF, N_MF), dtype=bool)
    mask[150:350, 100:300] = False
    edges = np.linspace(-2.0, 2.0, 5)
    settings = {"binning": "nu", "edges": edges.tolist()}
    full = build("minkowski", settings).measure(mapset(mf_fields, smoothing=S_MF))
    cut = build("minkowski", settings).measure(mapset(mf_fields, mask, smoothing=S_MF))
    assert cut.extra["n_pixels"][0, 0] < 0.9 * full.extra["n_pixels"][0, 0]
    n = len(mf_fields)
    a = full.values.reshape(3, n, -1).mean(axis=1)
    b = cut.values.reshape(3, n, -1).mean(axis=1)
    np.testing.assert_allclose(b[1], a[1], rtol=0.05)
    np.testing.assert_allclose(b[0], a[0], rtol=0.05)


# --------------------------------------------------------------------------------------
# bispectrum
# --------------------------------------------------------------------------------------
N_BS = 512
R_BS = 16
DOMEGA = PIX_RAD**2


def power_law_spectrum(n: int) -> np.ndarray:
    """P(ell) ~ ell^-1.5 in sr on the rfft2 grid (zero at ell = 0), with unit field variance."""
    k = np.sqrt(_k2_grid(n))
    p = np.zeros_like(k)
    p[k > 0] = k[k > 0] ** -1.5
    w = np.full(n // 2 + 1, 2.0)
    w[0] = 1.0
    w[-1] = 1.0
    # field variance = N^-4 sum_k <|a_k|^2> = N^-2 sum_k P / dOmega (Parseval)
    variance = (p * w[None, :]).sum() / n**2
    return p / variance * DOMEGA


def field_with_spectrum(rng, p_half: np.ndarray, n: int) -> np.ndarray:
    """Gaussian field with <|a_k|^2> = N^2 P / dOmega (the DFT convention of the estimator)."""
    w = scipy.fft.rfft2(rng.standard_normal((n, n)))
    return scipy.fft.irfft2(w * np.sqrt(p_half / DOMEGA), s=(n, n))


@pytest.fixture(scope="module")
def bispectrum_setup():
    rng = np.random.default_rng(1618)
    p_half = power_law_spectrum(N_BS)
    phi = np.array([field_with_spectrum(rng, p_half, N_BS) for _ in range(R_BS)])
    m = build("bispectrum", {}).measure(mapset(phi))
    edges = m.bin_edges
    ell_mean = bin_mean_ell(N_BS, PIX_RAD, edges)
    configs = configuration_triples(edges, ell_mean)
    q = shell_fields(p_half, N_BS, PIX_RAD, edges, dtype=np.float64)
    j = shell_fields(np.ones_like(p_half), N_BS, PIX_RAD, edges, dtype=np.float64)
    return p_half, phi, m, configs, q, j


def test_triangle_counts_brute_force():
    # count of closed triplets by direct enumeration of mode pairs (definition)
    n, pix = 32, PIX_RAD
    edges = np.array([2.0, 4.0, 6.0, 8.0]) * 2 * np.pi / (n * pix)
    kmax = 8
    ky, kx = np.mgrid[-kmax : kmax + 1, -kmax : kmax + 1]
    kk = np.stack([ky.ravel(), kx.ravel()], 1)
    lf = 2 * np.pi / (n * pix)
    b_of = lambda v: np.digitize(lf * np.hypot(v[..., 0], v[..., 1]), edges) - 1
    k3 = -(kk[:, None, :] + kk[None, :, :])
    b1, b2, b3 = b_of(kk)[:, None], b_of(kk)[None, :], b_of(k3)
    triples = [(0, 0, 0), (1, 1, 1), (2, 2, 2), (1, 1, 0), (2, 2, 0), (2, 2, 1), (0, 0, 1), (1, 1, 2)]
    brute = [np.sum((b1 == a) & (b2 == b) & (b3 == c)) for a, b, c in triples]
    np.testing.assert_array_equal(triangle_counts(n, pix, edges, triples), brute)


def _binned_gaussian_sigma(q, j, triples, m_grid):
    """Gaussian variance of the estimator, from Wick's theorem in real space:
    var(sum_x I_a I_a I_c) = s M^2 sum_r C_a^2 C_c, C_b = N^2 Q_b / (dOmega M^2),
    s = 6 (equilateral) or 2 (isosceles); the C_b(0)^2 sum_r C_c term vanishes because
    no shell contains ell = 0."""
    out = []
    for a, b, c in triples:
        s = 6.0 if a == b == c else 2.0
        ca, cc = q[a] * N_BS**2 / (DOMEGA * m_grid**2), q[c] * N_BS**2 / (DOMEGA * m_grid**2)
        var_sum = s * m_grid**2 * np.sum(ca * ca * cc)
        norm = np.sum(j[a] * j[b] * j[c])
        out.append(np.sqrt(var_sum) / norm * DOMEGA**2 / N_BS**2)
    return np.array(out)


def _rows(m, configs, label):
    """(values, triples) of the measurement rows of one map, skipping absent configurations."""
    vals, triples = [], []
    for kind, rows in configs:
        row = m.values[m.entries.index(f"{kind}:{label}")]
        for b, t in enumerate(rows):
            if t is not None:
                vals.append(row[b])
                triples.append(t)
    return np.array(vals), triples


def test_bispectrum_gaussian_consistent_with_zero(bispectrum_setup):
    p_half, phi, m, configs, q, j = bispectrum_setup
    _, m_grid = transform_size(N_BS, PIX_RAD, m.bin_edges)
    z = []
    for r in range(R_BS):
        vals, triples = _rows(m, configs, f"r{r}")
        z.append(vals / _binned_gaussian_sigma(q, j, triples, m_grid))
    z = np.array(z)  # (realisations, configurations)
    assert z.shape[1] >= 25
    # mean over realisations: consistent with zero at 4 sigma for every configuration
    assert np.all(np.abs(z.mean(axis=0)) < 4.0 / np.sqrt(R_BS))
    # the scatter is the Gaussian prediction (pooled over configurations), within 15%
    assert z.std() == pytest.approx(1.0, rel=0.15)


def test_bispectrum_local_quadratic_tree_level(bispectrum_setup):
    p_half, phi, m0, configs, q, j = bispectrum_setup
    f = 0.1  # f sigma_phi = 0.1: loop corrections ~ (f sigma)^2, a few per cent
    kappa = phi + f * (phi**2 - (phi**2).mean(axis=(1, 2), keepdims=True))
    m = build("bispectrum", {}).measure(mapset(kappa))
    # tree level B = 2 f [P1 P2 + P2 P3 + P3 P1] (Komatsu & Spergel 2001, local model),
    # averaged over the closed triangles of each bin triple exactly as the estimator does:
    # sum_tri P1 P2 = M^4 sum_x Q_a Q_b J_c, Q = shell-filtered P, J = shell-filtered ones
    _, triples = _rows(m, configs, "r0")
    theory = np.array(
        [
            2 * f * (np.sum(q[a] * q[b] * j[c]) + np.sum(j[a] * q[b] * q[c]) + np.sum(q[a] * j[b] * q[c]))
            / np.sum(j[a] * j[b] * j[c])
            for a, b, c in triples
        ]
    )
    # control variate: subtracting the estimate of phi itself removes the Gaussian
    # (f-independent) part of the sample scatter
    diff = np.array([_rows(m, configs, f"r{r}")[0] - _rows(m0, configs, f"r{r}")[0] for r in range(R_BS)])
    measured = diff.mean(axis=0)
    err = diff.std(axis=0, ddof=1) / np.sqrt(R_BS)
    # every configuration consistent within 4 standard errors of the mean ...
    assert np.all(np.abs(measured - theory) < 4 * err)
    # ... and within 10% wherever the standard error is below 3% (enough triangles)
    precise = err < 0.03 * np.abs(theory)
    assert precise.sum() >= 6
    np.testing.assert_allclose(measured[precise], theory[precise], rtol=0.10)



# --------------------------------------------------------------------------------------
# interface: defaults, noise-based nu, settings errors
# --------------------------------------------------------------------------------------
@pytest.mark.parametrize("name", ["pdf", "moments", "peaks", "minima", "minkowski", "bispectrum"])
def test_defaults_give_labelled_vectors(peak_fields, name):
    m = build(name, {}).measure(mapset(peak_fields[:2, :256, :256], smoothing=S_PEAK))
    assert m.values.shape == (len(m.entries), len(m.bin_centers))
    assert all(label.endswith(("r0", "r1")) for label in m.entries)
    for key, value in m.extra.items():
        assert value.shape in (m.values.shape, m.bin_centers.shape), key
    if m.bin_edges is not None:
        assert len(m.bin_edges) == len(m.bin_centers) + 1
    assert np.isfinite(m.values).sum() > 0


def test_nu_uses_noise_sigma(peak_fields):
    # nu = kappa / sigma_noise when the maps carry a noise level: the nu-binned density is
    # sigma times the kappa-binned one on edges scaled by sigma (change of variable)
    kappa = 0.01 * peak_fields[:1]
    sigma = 0.004
    edges = np.linspace(-5, 5, 11)
    nu = build("pdf", {"binning": "nu", "edges": edges.tolist()}).measure(mapset(kappa, noise=np.array([sigma])))
    kp = build("pdf", {"binning": "kappa", "edges": (edges * sigma).tolist()}).measure(mapset(kappa))
    np.testing.assert_allclose(nu.values, kp.values * sigma, rtol=1e-12)
    # without a noise level nu falls back to the map's own rms
    own = build("pdf", {"binning": "nu", "edges": edges.tolist()}).measure(mapset(kappa))
    np.testing.assert_allclose(own.extra["scale"][0, 0], kappa.std(), rtol=1e-12)


@pytest.mark.parametrize(
    "name, settings, key",
    [
        ("peaks", {"bins": 0}, "statistics.peaks.bins"),
        ("peaks", {"bins": 2.5}, "statistics.peaks.bins"),
        ("minima", {"binning": "snr"}, "statistics.minima.binning"),
        ("pdf", {"edges": [0.0, 0.0, 1.0]}, "statistics.pdf.edges"),
        ("pdf", {"min": 1.0, "max": 0.0}, "statistics.pdf.max"),
        ("pdf", {"min": "low"}, "statistics.pdf.min"),
        ("minkowski", {"margin_arcmin": -1.0}, "statistics.minkowski.margin_arcmin"),
        ("minkowski", {"periodic": "yes"}, "statistics.minkowski.periodic"),
        ("moments", {"margin_arcmin": "wide"}, "statistics.moments.margin_arcmin"),
        ("bispectrum", {"configurations": ["triangle"]}, "statistics.bispectrum.configurations"),
        ("bispectrum", {"isosceles_ratios": [3.0]}, "statistics.bispectrum.isosceles_ratios"),
        ("bispectrum", {"ell_min": 1000.0, "ell_max": 100.0}, "statistics.bispectrum.ell_max"),
        ("bispectrum", {"bins": -1}, "statistics.bispectrum.bins"),
        ("bispectrum", {"spacing": "cubic"}, "statistics.bispectrum.spacing"),
        ("bispectrum", {"squeezed_min_ratio": 0.5}, "statistics.bispectrum.squeezed_min_ratio"),
        ("bispectrum", {"ell_edges": [100.0, 50.0]}, "statistics.bispectrum.ell_edges"),
    ],
)
def test_bad_settings_name_the_key(name, settings, key):
    field = np.zeros((1, 32, 32))
    field[0, 10, 10] = 1.0
    with pytest.raises(RaytraceError) as info:
        build(name, settings).measure(mapset(field))
    message = str(info.value)
    assert message.startswith(key + ":")
    assert "\n" not in message


@pytest.mark.parametrize("name", ["pdf", "moments", "peaks", "minima", "minkowski", "bispectrum"])
def test_masked_pixels_do_not_contribute(peak_fields, name):
    # values under the mask are never read: NaN there changes nothing (definition of a mask)
    field = peak_fields[0, :256, :256].copy()
    mask = np.ones(field.shape, dtype=bool)
    mask[40:90, 100:180] = False
    spoiled = np.where(mask, field, np.nan)
    a = build(name, {}).measure(mapset(field, mask, smoothing=S_PEAK))
    b = build(name, {}).measure(mapset(spoiled, mask, smoothing=S_PEAK))
    np.testing.assert_array_equal(np.isnan(a.values), np.isnan(b.values))
    np.testing.assert_allclose(a.values, b.values, rtol=1e-6, atol=0)
