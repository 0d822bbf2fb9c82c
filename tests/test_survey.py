"""Tests of raytrace.survey against published formulas and reference libraries."""

from __future__ import annotations

import math
import warnings

import h5py
import numpy as np
import pytest
import scipy.ndimage
import scipy.stats
from astropy.io import fits
from astropy.wcs import WCS

from raytrace import survey
from raytrace.errors import RaytraceError


# ---------------------------------------------------------------------------
# Source distributions
# ---------------------------------------------------------------------------


@pytest.mark.parametrize("z0, alpha, beta", [(0.64, 2.0, 1.5), (0.5, 1.3, 2.2), (1.0, 0.5, 1.0)])
def test_smail_normalisation_and_mean(z0, alpha, beta):
    z = np.linspace(0.0, 40.0, 400001)  # tails beyond z = 40 are below 1e-12 for these parameters
    n = survey.smail_nz(z, z0, alpha, beta)
    # unit integral over z >= 0 (Smail et al. 1994 normalised with Gamma functions)
    assert np.trapezoid(n, z) == pytest.approx(1.0, abs=2e-5)
    # <z> = z0 Gamma((alpha+2)/beta) / Gamma((alpha+1)/beta) (moments of the Smail n(z))
    mean_analytic = z0 * math.gamma((alpha + 2) / beta) / math.gamma((alpha + 1) / beta)
    assert np.trapezoid(z * n, z) == pytest.approx(mean_analytic, rel=1e-5)
    # same density as scipy's generalised gamma distribution (Stacy 1962): a=(alpha+1)/beta, c=beta
    ref = scipy.stats.gengamma(a=(alpha + 1) / beta, c=beta, scale=z0)
    zz = np.linspace(0.05, 4.0, 50)
    np.testing.assert_allclose(survey.smail_nz(zz, z0, alpha, beta), ref.pdf(zz), rtol=1e-10)


def test_zero_scatter_bins_partition_nz_exactly():
    z = np.linspace(0.0, 4.0, 2001)
    n = survey.normalise_nz(z, survey.smail_nz(z, 0.7, 2.0, 1.5))
    bins = survey.tomographic_bins(z, n, edges=[0.0, 0.5, 0.9, 1.4, 4.0])
    # partition of unity: sum_i f_i n_i(z) = n(z) and sum_i f_i = 1 (definition of a partition)
    np.testing.assert_allclose((bins.fractions[:, None] * bins.nz).sum(0), n, rtol=1e-12, atol=1e-14)
    assert bins.fractions.sum() == pytest.approx(1.0, abs=1e-12)
    # each bin is confined to its own edges (zero photo-z scatter: photo-z = true z)
    for i, (lo, hi) in enumerate(zip(bins.edges[:-1], bins.edges[1:])):
        outside = (z < lo) | (z >= hi) if i < bins.n_bins - 1 else (z < lo)
        assert np.all(bins.nz[i][outside] == 0.0)
        np.testing.assert_allclose(np.trapezoid(bins.nz[i], z), 1.0, rtol=1e-12)


def test_equal_number_bins_hold_equal_fractions():
    z = np.linspace(0.0, 5.0, 5001)
    n = survey.normalise_nz(z, survey.smail_nz(z, 0.64, 2.0, 1.5))
    n_bins = 5
    bins = survey.tomographic_bins(z, n, n_bins=n_bins)
    # edges are exact quantiles of the piecewise-linear n(z): compare with the
    # cumulative trapezoid integral interpolated at the edges (reference quadrature)
    cdf = np.concatenate([[0.0], np.cumsum(0.5 * (n[1:] + n[:-1]) * np.diff(z))])
    np.testing.assert_allclose(np.interp(bins.edges, z, cdf), np.linspace(0, 1, n_bins + 1), atol=2 * n.max() * (z[1] - z[0]) ** 2)
    # on the grid the bins can differ from 1/n_bins by at most one cell of probability
    assert np.max(np.abs(bins.fractions - 1.0 / n_bins)) <= n.max() * (z[1] - z[0])


def test_photoz_scatter_bins_against_normal_cdf():
    z = np.linspace(0.0, 4.0, 4001)
    n = survey.normalise_nz(z, survey.smail_nz(z, 0.64, 2.0, 1.5))
    sigma_z = 0.05
    edges = [0.2, 0.6, 1.0, 2.0]
    bins = survey.tomographic_bins(z, n, edges=edges, sigma_z=sigma_z)
    # photo-z ~ N(z, sigma_z (1+z)) (Ma, Hu & Huterer 2006): probability from scipy's normal cdf
    for i in range(3):
        p = scipy.stats.norm.cdf(edges[i + 1], loc=z, scale=sigma_z * (1 + z)) - scipy.stats.norm.cdf(edges[i], loc=z, scale=sigma_z * (1 + z))
        expected = n * p
        frac = np.trapezoid(expected, z)
        assert bins.fractions[i] == pytest.approx(frac, rel=1e-10)
        np.testing.assert_allclose(bins.nz[i], expected / frac, rtol=1e-8, atol=1e-12)
    # with open outer edges the erf differences telescope: the bins partition n(z) (identity)
    open_bins = survey.tomographic_bins(z, n, edges=edges, sigma_z=sigma_z, open_outer_edges=True)
    np.testing.assert_allclose((open_bins.fractions[:, None] * open_bins.nz).sum(0), n, rtol=1e-10, atol=1e-13)
    # scatter widens the bins beyond their edges (Gaussian tails, non-zero outside)
    assert bins.nz[1][z < 0.5].max() > 0


def test_tabulated_nz_and_errors(tmp_path):
    z = np.linspace(0.0, 3.0, 61)
    raw = z**2 * np.exp(-((z / 0.5) ** 1.5))
    good = tmp_path / "nz.txt"
    np.savetxt(good, np.column_stack([z, 7.0 * raw]), header="z n")
    zt, nt = survey.load_nz_table(good)
    np.testing.assert_allclose(nt, raw / np.trapezoid(raw, z), rtol=1e-6)  # savetxt keeps 18 digits
    # interpolation onto another grid: linear (numpy.interp as reference)
    zg = np.linspace(0, 3, 301)
    _, ng = survey.load_nz_table(good, zg)
    ref = np.interp(zg, z, raw)
    np.testing.assert_allclose(ng, ref / np.trapezoid(ref, zg), rtol=1e-6)

    neg = tmp_path / "neg.txt"
    np.savetxt(neg, np.column_stack([z, raw - 0.05]))
    with pytest.raises(RaytraceError, match=r"survey\.sources\.nz\.file: .*neg\.txt has negative"):
        survey.load_nz_table(neg)
    zero = tmp_path / "zero.txt"
    np.savetxt(zero, np.column_stack([z, 0 * z]))
    with pytest.raises(RaytraceError, match=r"zero\.txt n\(z\) has no support"):
        survey.load_nz_table(zero)
    # support outside the requested grid is also "no support"
    with pytest.raises(RaytraceError, match=r"nz\.txt n\(z\) has no support"):
        survey.load_nz_table(good, np.linspace(5, 6, 11))
    junk = tmp_path / "junk.txt"
    junk.write_text("not a table\n1 2 3\n")
    with pytest.raises(RaytraceError, match=r"junk\.txt"):
        survey.load_nz_table(junk)
    with pytest.raises(RaytraceError, match=r"missing\.txt"):
        survey.load_nz_table(tmp_path / "missing.txt")
    msg = None
    try:
        survey.load_nz_table(neg)
    except RaytraceError as exc:
        msg = str(exc)
    assert msg is not None and "\n" not in msg


def test_source_bins_from_config(tmp_path):
    cfg = {"nz": {"kind": "smail", "z0": 0.6, "alpha": 2.0, "beta": 1.5}, "z_max": 4.0, "z_points": 801,
           "bins": {"n_bins": 3}, "photoz_sigma": 0.0}
    bins = survey.source_bins(cfg)
    assert bins.n_bins == 3
    # zero scatter, edges spanning the grid: fractions add up to one (partition)
    assert bins.fractions.sum() == pytest.approx(1.0, abs=1e-12)
    z = np.linspace(0, 4, 801)
    np.savetxt(tmp_path / "nz.txt", np.column_stack([z, survey.smail_nz(z, 0.6)]))
    tab = survey.source_bins({**cfg, "nz": {"kind": "table", "file": "nz.txt"}}, base_dir=tmp_path)
    np.testing.assert_allclose(tab.nz, bins.nz, rtol=1e-6, atol=1e-9)  # same n(z) via the file
    with pytest.raises(RaytraceError, match=r"survey\.sources\.nz\.kind"):
        survey.source_bins({"nz": {"kind": "gauss"}})
    with pytest.raises(RaytraceError, match=r"survey\.sources\.nz\.file: .*absent\.txt"):
        survey.source_bins({"nz": {"kind": "table", "file": str(tmp_path / "absent.txt")}})
    with pytest.raises(RaytraceError, match=r"survey\.sources\.photoz_sigma"):
        survey.source_bins({**cfg, "photoz_sigma": -0.1})


# ---------------------------------------------------------------------------
# Shape noise
# ---------------------------------------------------------------------------


@pytest.mark.parametrize("n_gal", [26.0, 30.0])
def test_noise_rms_and_white_power_spectrum(n_gal):
    sigma_e, n_pix, field_deg = 0.26, 512, 2.0  # typical deep-survey values (from memory)
    maps = survey.shape_noise_maps(n_pix, field_deg, sigma_e, n_gal, seed=11, realisation=3, bin_index=1)
    a_pix_arcmin2 = (60.0 * field_deg / n_pix) ** 2
    sigma_pix = sigma_e / np.sqrt(n_gal * a_pix_arcmin2)  # sigma_e / sqrt(n A_pix) (Kaiser 1992)
    pixel_rad = np.deg2rad(field_deg) / n_pix
    n_sr = n_gal * (180.0 * 60.0 / np.pi) ** 2  # galaxies per steradian
    for name, m in maps.items():
        # rms: sample std has relative error 1/sqrt(2 N) = 0.14 %
        assert m.std() == pytest.approx(sigma_pix, rel=0.01), name
        # flat-sky power C = A_pix |FFT|^2 / N^2 (common-practice estimator), white at sigma_e^2 / n
        power = pixel_rad**2 * np.abs(np.fft.fft2(m)) ** 2 / n_pix**2
        ly = 2 * np.pi * np.fft.fftfreq(n_pix, d=pixel_rad)
        ell = np.hypot(ly[:, None], ly[None, :])
        # four |ell| bins up to the axis Nyquist frequency; the outer three hold >= 38000
        # modes each (half independent), i.e. <= 0.7 % scatter of the mean power
        edges = np.linspace(0.25, 1.0, 4) * np.pi / pixel_rad
        for lo, hi in zip(edges[:-1], edges[1:]):
            sel = (ell >= lo) & (ell < hi)
            assert power[sel].mean() == pytest.approx(sigma_e**2 / n_sr, rel=0.03), (name, lo)


def test_noise_is_paired_and_components_independent():
    kw = dict(n_pix=256, field_deg=1.0, sigma_e=0.26, galaxies_per_arcmin2=10.0)
    a = survey.shape_noise_maps(**kw, seed=5, realisation=7, bin_index=0)
    b = survey.shape_noise_maps(**kw, seed=5, realisation=7, bin_index=0, components=("gamma2", "kappa"))
    c = survey.shape_noise_maps(**kw, seed=5, realisation=8, bin_index=0)
    d = survey.shape_noise_maps(**kw, seed=5, realisation=7, bin_index=1)
    # the same realisation gets the same noise, whichever components are requested (pairing)
    np.testing.assert_array_equal(a["kappa"], b["kappa"])
    np.testing.assert_array_equal(a["gamma2"], b["gamma2"])
    # independent streams: correlation coefficients within 5/sqrt(N) of zero (N = 65536)
    bound = 5.0 / 256
    pairs = [(a["kappa"], a["gamma1"]), (a["gamma1"], a["gamma2"]), (a["kappa"], c["kappa"]), (a["kappa"], d["kappa"])]
    for x, y in pairs:
        assert abs(np.corrcoef(x.ravel(), y.ravel())[0, 1]) < bound


# ---------------------------------------------------------------------------
# Masks
# ---------------------------------------------------------------------------


def test_star_mask_area_statistics():
    n_pix, field_deg = 1024, 4.0
    rho, r_min, r_max, s = 50.0, 0.5, 5.0, 3.0
    mask, holes = survey.star_mask(n_pix, field_deg, holes_per_deg2=rho, r_min_arcmin=r_min, r_max_arcmin=r_max,
                                   slope=s, seed=3, return_holes=True)
    # number of centres: Poisson over the field enlarged by r_max on each side
    side_deg = field_deg + 2 * r_max / 60.0
    mean_n = rho * side_deg**2
    assert abs(holes.radius_arcmin.size - mean_n) < 5 * np.sqrt(mean_n)
    # radii follow dN/dr ~ r^-3 on [r_min, r_max]: KS test against the analytic CDF
    cdf = lambda r: (r_min**-2 - r**-2) / (r_min**-2 - r_max**-2)
    assert scipy.stats.kstest(holes.radius_arcmin, cdf).pvalue > 1e-3
    # Boolean model (Stoyan, Kendall & Mecke 1995): valid fraction exp(-rho pi <r^2>) at
    # pixel centres; for s = 3, <r^2> = ln(r_max/r_min) / [(r_min^-2 - r_max^-2)/2] (integral of the power law)
    mean_r2 = np.log(r_max / r_min) / (0.5 * (r_min**-2 - r_max**-2))
    rho_arcmin = rho / 3600.0
    expected = np.exp(-rho_arcmin * np.pi * mean_r2)
    # scatter of the covered area, first order (Campbell's theorem): var = rho A pi^2 <r^4>
    mean_r4 = 0.5 * (r_max**2 - r_min**2) / (0.5 * (r_min**-2 - r_max**-2))
    area = (60 * field_deg) ** 2
    sigma = np.sqrt(rho_arcmin * area * np.pi**2 * mean_r4) / area
    assert abs(survey.valid_fraction(mask) - expected) < 4 * sigma
    # each hole is masked: the pixel containing a hole's centre (well inside the field) is invalid
    d = 60 * field_deg / n_pix
    inside = (np.abs(holes.x_arcmin) < 60 * field_deg / 2 - d) & (np.abs(holes.y_arcmin) < 60 * field_deg / 2 - d)
    big = inside & (holes.radius_arcmin > d)
    j = ((holes.x_arcmin[big] + 30 * field_deg) / d).astype(int)
    i = ((holes.y_arcmin[big] + 30 * field_deg) / d).astype(int)
    assert not mask[i, j].any()


def test_star_mask_coverage_is_homogeneous_up_to_the_edges():
    n_pix, field_deg = 512, 1.0
    rho, r_min, r_max = 2000.0, 0.5, 2.0
    # Boolean model (Stoyan, Kendall & Mecke 1995): P(valid) = exp(-rho pi <r^2>) at every point,
    # including points within r_max of the field edge, since centres also fall outside the field
    mean_r2 = np.log(r_max / r_min) / (0.5 * (r_min**-2 - r_max**-2))
    expected = np.exp(-rho / 3600.0 * np.pi * mean_r2)
    d = 60 * field_deg / n_pix
    c = (np.arange(n_pix) + 0.5) * d
    near = np.minimum(c, 60 * field_deg - c) < r_max
    strip = near[:, None] | near[None, :]
    fr = np.array([[m[strip].mean(), m[~strip].mean()] for m in (
        survey.star_mask(n_pix, field_deg, holes_per_deg2=rho, r_min_arcmin=r_min, r_max_arcmin=r_max, slope=3.0, seed=s)
        for s in range(12))])
    # mean over 12 independent masks against the model, scatter of the mean from the masks themselves
    err = fr.std(axis=0, ddof=1) / np.sqrt(len(fr))
    assert np.all(np.abs(fr.mean(axis=0) - expected) < 4 * err)


def test_border_and_stripe_masks():
    n_pix, field_deg = 240, 2.0  # pixel side 0.5 arcmin
    d = 60 * field_deg / n_pix
    # pixel centres at (k + 1/2) d from the edge: a 3-pixel border masks k = 0, 1, 2 per side
    m = survey.border_mask(n_pix, field_deg, 3 * d)
    assert survey.valid_fraction(m) == pytest.approx(((n_pix - 6) / n_pix) ** 2, abs=1e-15)
    assert m[3, 3] and not m[2, 100] and not m[100, n_pix - 3]
    # aligned stripes of width w every s pixels mask exactly w/s of the pixel centres
    st = survey.stripe_mask(n_pix, field_deg, width_arcmin=4 * d, spacing_arcmin=24 * d, offset_arcmin=0.0)
    assert survey.valid_fraction(st) == pytest.approx(1 - 4 / 24, abs=1e-15)
    assert np.all(st.all(axis=1) | ~st.any(axis=1))  # stripes along x: whole rows
    # inclined stripes: 1 - w/s up to the sampling of the pixel grid
    st2 = survey.stripe_mask(n_pix, field_deg, width_arcmin=3.3, spacing_arcmin=17.0, angle_deg=31.0)
    assert survey.valid_fraction(st2) == pytest.approx(1 - 3.3 / 17.0, abs=0.01)


def test_user_masks_and_build_mask(tmp_path):
    rng = np.random.default_rng(0)
    user = rng.random((64, 64)) > 0.2
    np.save(tmp_path / "mask.npy", user)
    fits.PrimaryHDU(user.astype(np.int16)).writeto(tmp_path / "mask.fits")
    np.testing.assert_array_equal(survey.load_user_mask(tmp_path / "mask.npy", 64), user)
    np.testing.assert_array_equal(survey.load_user_mask(tmp_path / "mask.fits", 64), user)
    with pytest.raises(RaytraceError, match=r"^survey\.mask\.file: .*mask\.npy has shape \(64, 64\), maps are \(128, 128\)$"):
        survey.load_user_mask(tmp_path / "mask.npy", 128)
    with pytest.raises(RaytraceError, match=r"survey\.mask\.file: .*mask\.fits has shape"):
        survey.load_user_mask(tmp_path / "mask.fits", 32)
    with pytest.raises(RaytraceError, match=r"nothere\.npy does not exist"):
        survey.load_user_mask(tmp_path / "nothere.npy", 64)
    settings = {"file": "mask.npy", "border_arcmin": 2.0,
                "holes": {"per_deg2": 100.0, "r_min_arcmin": 0.5, "r_max_arcmin": 2.0}}
    mask, fr = survey.build_mask(settings, 64, 1.0, seed=1, base_dir=tmp_path)
    assert fr["total"] == survey.valid_fraction(mask)
    assert fr["file"] == pytest.approx(user.mean())
    assert fr["total"] <= min(fr["file"], fr["border"], fr["holes"])
    assert not np.any(mask & ~user)
    with pytest.raises(RaytraceError, match=r"survey\.mask\.holes\.r_max_arcmin: required"):
        survey.build_mask({"holes": {"per_deg2": 1.0, "r_min_arcmin": 1.0}}, 64, 1.0)
    with pytest.raises(RaytraceError, match=r"survey\.mask\.radius"):
        survey.build_mask({"radius": 1.0}, 64, 1.0)


# ---------------------------------------------------------------------------
# Smoothing
# ---------------------------------------------------------------------------


def test_gaussian_smoothing_variance_of_white_noise():
    n_pix, field_deg = 1024, 4.0
    rng = np.random.default_rng(42)
    white = rng.standard_normal((n_pix, n_pix))
    d_arcmin = 60 * field_deg / n_pix
    scales = [2.5 * d_arcmin, 4.0 * d_arcmin]
    sm = survey.smooth_maps(white, field_deg, scales, kernel="gaussian")
    for k, sig in enumerate(scales):
        # continuum limit (common practice): var = sigma_pix^2 / (4 pi sigma^2 n), n = 1/A_pix
        expected = d_arcmin**2 / (4 * np.pi * sig**2)
        # sample scatter of the variance: sqrt(4 pi sigma^2 / A) = 1.1 % at 4 pixels
        assert sm[k].var() == pytest.approx(expected, rel=0.04)
        assert survey.smoothed_noise_sigma(1.0, n_pix, field_deg, sig) ** 2 == pytest.approx(expected, rel=0.005)
    # top-hat of radius R: var = sigma_pix^2 / (pi R^2 n) (continuum limit, common practice)
    radius = 5.0 * d_arcmin
    th = survey.smooth_maps(white, field_deg, [radius], kernel="tophat")[0]
    # (the Fourier-space disc misses the power beyond the Nyquist frequency, a deficit of about
    # 2 / (pi l_Nyq R) = 4 % here from the asymptotic form of J1, hence the 6 % tolerance)
    assert th.var() == pytest.approx(d_arcmin**2 / (np.pi * radius**2), rel=0.06)
    # and the exact grid value (Parseval) within the 1.4 % sample scatter at this scale
    assert th.var() == pytest.approx(survey.smoothed_noise_sigma(1.0, n_pix, field_deg, radius, "tophat") ** 2, rel=0.05)


def test_gaussian_smoothing_matches_scipy_ndimage_and_fwhm():
    n_pix, field_deg = 128, 1.0
    rng = np.random.default_rng(1)
    m = rng.standard_normal((n_pix, n_pix))
    d_arcmin = 60 * field_deg / n_pix
    sig_pix = [1.5, 3.0]
    sm = survey.smooth_maps(m, field_deg, [s * d_arcmin for s in sig_pix])
    for k, s in enumerate(sig_pix):
        # scipy.ndimage.gaussian_filter on the periodic map (sampled kernel, standard deviation s pixels)
        ref = scipy.ndimage.gaussian_filter(m, s, mode="wrap", truncate=10.0)
        # the sampled kernel's transform differs from exp(-k^2 s^2/2) by its aliases, at most
        # ~2 exp(-pi^2 s^2/2) at the Nyquist frequency (Poisson summation); Parseval bounds the rms
        bound = (3.0 * np.exp(-0.5 * np.pi**2 * s**2) + 1e-13) * m.std()  # plus double-precision FFT round-off
        assert np.sqrt(np.mean((sm[k] - ref) ** 2)) < bound
        # the multi-scale call equals one call per scale
        np.testing.assert_allclose(sm[k], survey.smooth_maps(m, field_deg, [s * d_arcmin])[0], rtol=1e-12, atol=1e-14)
    # FWHM = 2 sqrt(2 ln 2) sigma (Gaussian profile): choose sigma so that FWHM/2 = 5 pixels;
    # a delta map smoothed by sigma then falls to half its peak exactly 5 pixels away
    sig = survey.gaussian_sigma_from_fwhm(10.0)
    assert sig == pytest.approx(10.0 / (2 * np.sqrt(2 * np.log(2))), rel=1e-15)
    assert survey.gaussian_fwhm(sig) == pytest.approx(10.0, rel=1e-15)
    delta = np.zeros((n_pix, n_pix))
    delta[64, 64] = 1.0
    prof = survey.smooth_maps(delta, field_deg, [sig * d_arcmin])[0][64]
    assert prof[69] / prof[64] == pytest.approx(0.5, rel=1e-9)
    assert prof[59] / prof[64] == pytest.approx(0.5, rel=1e-9)
    # and the profile is the Gaussian of standard deviation sig pixels (not FWHM)
    x = np.arange(-12, 13)
    np.testing.assert_allclose(prof[64 + x] / prof[64], np.exp(-0.5 * x**2 / sig**2), rtol=1e-9)


def test_mask_aware_smoothing_and_kernel_errors():
    n_pix, field_deg = 256, 2.0
    mask = survey.star_mask(n_pix, field_deg, holes_per_deg2=200, r_min_arcmin=0.5, r_max_arcmin=3.0, seed=2)
    const = np.full((n_pix, n_pix), 0.3)
    # normalised convolution reproduces a constant field exactly where valid (Knutsson & Westin 1993)
    out = survey.smooth_maps(np.where(mask, const, 0.0), field_deg, [2.0], mask=mask)[0]
    np.testing.assert_allclose(out[mask], 0.3, rtol=1e-9)
    # plain smoothing of the zero-filled map is biased low near holes
    plain = survey.smooth_maps(np.where(mask, const, 0.0), field_deg, [2.0])[0]
    assert plain[mask].min() < 0.29
    for call in (lambda: survey.smooth_maps(const, field_deg, [1.0], kernel="boxcar"),
                 lambda: survey.kernel_fourier("boxcar", 1e-3, 16, 1e-4),
                 lambda: survey.observe_map(const, field_deg, {"smoothing": {"kernel": "boxcar", "scales_arcmin": [1.0]}})):
        with pytest.raises(RaytraceError, match=r"^survey\.smoothing\.kernel: unknown kernel 'boxcar'"):
            call()


def test_observe_map_noise_level_and_pairing():
    n_pix, field_deg = 256, 2.0
    settings = {"noise": {"sigma_e": 0.26, "galaxies_per_arcmin2": 20.0},
                "smoothing": {"kernel": "gaussian", "scales_arcmin": [1.0, 2.0]}}
    mask = survey.border_mask(n_pix, field_deg, 3.0)
    kappa = np.zeros((n_pix, n_pix))
    obs = survey.observe_map(kappa, field_deg, settings, mask=mask, seed=4, realisation=2)
    obs2 = survey.observe_map(kappa + 0.01, field_deg, settings, mask=mask, seed=4, realisation=2)
    # paired noise: the difference between two models is the signal difference only
    np.testing.assert_allclose((obs2.noisy - obs.noisy)[mask], 0.01, rtol=1e-9)
    assert np.all(obs.noisy[~mask] == 0) and np.all(obs.smoothed[:, ~mask] == 0)
    sigma_pix = 0.26 / np.sqrt(20.0 * (60 * field_deg / n_pix) ** 2)  # sigma_e / sqrt(n A_pix)
    assert obs.noise_sigma_pix == pytest.approx(sigma_pix, rel=1e-12)
    assert obs.noisy[mask].std() == pytest.approx(sigma_pix, rel=0.02)
    # smoothed noise rms: continuum value sigma_pix^2 A_pix / (4 pi sigma^2) (common practice)
    a_pix = (60 * field_deg / n_pix) ** 2
    for k, s in enumerate(obs.scales_arcmin):
        assert obs.noise_sigma_smoothed[k] ** 2 == pytest.approx(sigma_pix**2 * a_pix / (4 * np.pi * s**2), rel=0.01)


# ---------------------------------------------------------------------------
# Mock catalogs
# ---------------------------------------------------------------------------


def _constant_planes(n_pix, values):
    k, g1, g2 = (np.stack([np.full((n_pix, n_pix), v[c]) for v in values]) for c in range(3))
    return k, g1, g2


def test_seitz_schneider_transformation_limits():
    rng = np.random.default_rng(9)
    eps_s = survey.intrinsic_ellipticities(rng, 1000, 0.3)
    assert np.all(np.abs(eps_s) < 1)
    # g = 0 leaves shapes unchanged; eps_s = 0 gives eps = g (weak) or 1/g* (strong) (Seitz & Schneider 1997)
    np.testing.assert_allclose(survey.lens_ellipticity(eps_s, 0j), eps_s)
    np.testing.assert_allclose(survey.lens_ellipticity(0j, 0.3 - 0.2j), 0.3 - 0.2j)
    np.testing.assert_allclose(survey.lens_ellipticity(0j, 1.5 + 0.5j), 1 / np.conj(1.5 + 0.5j))
    # the weak branch is a Moebius map of the unit disc onto itself: |eps| < 1
    assert np.all(np.abs(survey.lens_ellipticity(eps_s, 0.6 + 0.3j)) < 1)
    # the inverse eps_s = (eps - g)/(1 - g* eps) (Bartelmann & Schneider 2001, sect. 4.2) recovers the source
    g = 0.25 + 0.1j
    e = survey.lens_ellipticity(eps_s, g)
    np.testing.assert_allclose((e - g) / (1 - np.conj(g) * e), eps_s, atol=1e-12)


def _ellipticity_from_moments(q):
    """Complex ellipticity from second moments (Bartelmann & Schneider 2001, sect. 4.1; from memory)."""
    q11, q22, q12 = q[..., 0, 0], q[..., 1, 1], q[..., 0, 1]
    return (q11 - q22 + 2j * q12) / (q11 + q22 + 2 * np.sqrt(q11 * q22 - q12**2))


@pytest.mark.parametrize("kap, gam1, gam2", [(0.1, 0.08, -0.05), (0.0, -0.2, 0.0), (0.3, 0.0, 0.15), (0.5, 0.6, 0.3)])
def test_ellipticity_sign_convention_from_lens_mapping(kap, gam1, gam2):
    # Jacobian of beta = theta - grad psi with gamma1 = (psi_xx - psi_yy)/2, gamma2 = psi_xy (axes x, y)
    a = np.array([[1 - kap - gam1, -gam2], [-gam2, 1 - kap + gam1]])
    a_inv = np.linalg.inv(a)
    rng = np.random.default_rng(3)
    # source ellipses: semi-axes a_s >= b_s at angle phi; |eps_s| = (a - b)/(a + b)
    q_axis = rng.uniform(0.3, 1.0, 50)
    phi = rng.uniform(0, np.pi, 50)
    rot = np.stack([np.stack([np.cos(phi), -np.sin(phi)], -1), np.stack([np.sin(phi), np.cos(phi)], -1)], -2)
    q_s = rot @ (np.eye(2) * np.stack([np.ones(50), q_axis**2], -1)[:, None, :]) @ np.swapaxes(rot, -1, -2)
    # image moments Q = A^-1 Q_s A^-T (Bartelmann & Schneider 2001, sect. 3.2: moments map with A^-1)
    q_img = a_inv @ q_s @ a_inv.T
    eps_s = _ellipticity_from_moments(q_s)
    np.testing.assert_allclose(np.abs(eps_s), (1 - q_axis) / (1 + q_axis), rtol=1e-12)
    g = survey.reduced_shear(kap, gam1, gam2)
    np.testing.assert_allclose(survey.lens_ellipticity(eps_s, g), _ellipticity_from_moments(q_img), atol=1e-12)
    # a round source: positive gamma1 makes Q_xx > Q_yy, i.e. images stretched along x (axis 1)
    q_round = a_inv @ a_inv.T
    assert np.sign(q_round[0, 0] - q_round[1, 1]) == np.sign(gam1) or gam1 == 0


@pytest.mark.parametrize("values, strong", [([(0.2, 0.05, -0.03)] * 2, False), ([(0.6, 0.5, 0.1)] * 2, True)])
def test_catalog_mean_ellipticity_recovers_reduced_shear(values, strong):
    n_pix, field_deg = 4, 0.2
    k, g1, g2 = _constant_planes(n_pix, values)
    # all galaxies between the two (identical) planes, so the shear is the same for every galaxy
    z = np.linspace(0.8, 2.0, 121)
    # only pixel [1, 2] is valid, so every galaxy falls in it
    mask = np.zeros((n_pix, n_pix), bool)
    mask[1, 2] = True
    cat = survey.mock_catalog(k, g1, g2, [0.8, 2.0], field_deg, z, np.ones_like(z), galaxies_per_arcmin2=5000.0,
                              sigma_e=0.26, mask=mask, seed=1, realisation=0)
    kap, gam1, gam2 = values[0]
    g = (gam1 + 1j * gam2) / (1 - kap)  # reduced shear (Bartelmann & Schneider 2001)
    # galaxies in one pixel (map axes: column j from theta_x, row i from theta_y)
    d = field_deg / n_pix
    j = np.floor((cat["theta_x_deg"] + field_deg / 2) / d).astype(int)
    i = np.floor((cat["theta_y_deg"] + field_deg / 2) / d).astype(int)
    sel = (i == 1) & (j == 2)
    assert sel.all()
    e = cat["e1"][sel] + 1j * cat["e2"][sel]
    n = sel.sum()
    assert n > 40000
    np.testing.assert_allclose(cat["g1"] + 1j * cat["g2"], g, rtol=1e-12)
    # <eps> = g for |g| <= 1 and 1/g* for |g| > 1 (Seitz & Schneider 1997)
    target = 1 / np.conj(g) if strong else g
    assert abs(g) > 1 if strong else abs(g) < 1
    # expected noise: sigma_e / sqrt(N) for the weak branch; the strong branch maps shapes
    # differently, so its measured scatter is used
    err = (0.26 if not strong else max(e.real.std(), e.imag.std())) / np.sqrt(n)
    assert abs(e.real.mean() - target.real) < 4 * err
    assert abs(e.imag.mean() - target.imag) < 4 * err


def test_catalog_interpolation_positions_redshifts_and_pairing():
    n_pix, field_deg = 32, 1.0
    # pixel centres (k + 1/2) d - F/2 in radians (project convention)
    d_rad = np.deg2rad(field_deg) / n_pix
    t = (np.arange(n_pix) + 0.5) * d_rad - np.deg2rad(field_deg) / 2
    ty, tx = np.meshgrid(t, t, indexing="ij")
    z_src = np.array([0.5, 1.0, 2.0])
    amp = np.array([1.0, 3.0, 4.0])
    base = 0.01 + 0.5 * tx - 0.2 * ty  # linear in angle: bilinear interpolation is exact
    kappa = amp[:, None, None] * base[None]
    gamma1 = 0.5 * kappa
    gamma2 = -0.25 * kappa
    z = np.linspace(0, 2.0, 2001)
    nz = survey.smail_nz(z, 0.5)
    mask = survey.border_mask(n_pix, field_deg, 60 * field_deg / n_pix)  # keep galaxies off the edge pixels
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # no galaxy beyond the last plane, no warning
        cat = survey.mock_catalog(kappa, gamma1, gamma2, z_src, field_deg, z, nz, galaxies_per_arcmin2=30.0,
                                  sigma_e=0.26, mask=mask, seed=2, realisation=5)
    # linear interpolation in redshift between planes, with zero lensing at z = 0 (numpy.interp as reference)
    a_z = np.interp(cat["z"], np.concatenate([[0.0], z_src]), np.concatenate([[0.0], amp]))
    expected = a_z * (0.01 + 0.5 * np.deg2rad(cat["theta_x_deg"]) - 0.2 * np.deg2rad(cat["theta_y_deg"]))
    np.testing.assert_allclose(cat["kappa"], expected, rtol=1e-9, atol=1e-13)
    np.testing.assert_allclose(cat["gamma1"], 0.5 * expected, rtol=1e-9, atol=1e-13)
    np.testing.assert_allclose(cat["gamma2"], -0.25 * expected, rtol=1e-9, atol=1e-13)
    # number: Poisson with mean n A_valid
    mean_n = 30.0 * mask.sum() * (60 * field_deg / n_pix) ** 2
    assert abs(cat["z"].size - mean_n) < 5 * np.sqrt(mean_n)
    # redshifts follow n(z) (Smail = generalised gamma, truncated at z = 2): KS test
    ref = scipy.stats.gengamma(a=3 / 1.5, c=1.5, scale=0.5)
    assert scipy.stats.kstest(cat["z"], lambda x: ref.cdf(x) / ref.cdf(2.0)).pvalue > 1e-3
    # positions uniform over valid pixels only
    d = field_deg / n_pix
    j = np.floor((cat["theta_x_deg"] + field_deg / 2) / d).astype(int)
    i = np.floor((cat["theta_y_deg"] + field_deg / 2) / d).astype(int)
    assert mask[i, j].all()
    # paired catalogs: another model (other maps), same realisation -> same galaxies and shapes
    cat2 = survey.mock_catalog(2 * kappa, gamma1, gamma2, z_src, field_deg, z, nz, galaxies_per_arcmin2=30.0,
                               sigma_e=0.26, mask=mask, seed=2, realisation=5)
    for col in ("theta_x_deg", "theta_y_deg", "z", "e1_int", "e2_int"):
        np.testing.assert_array_equal(cat[col], cat2[col])
    np.testing.assert_allclose(cat2["kappa"], 2 * cat["kappa"])
    # galaxies beyond the last plane trigger a warning
    with pytest.warns(UserWarning, match="beyond the last source plane"):
        survey.mock_catalog(kappa[:2], gamma1[:2], gamma2[:2], z_src[:2], field_deg, z, nz, galaxies_per_arcmin2=5.0,
                            sigma_e=0.26, seed=2)


def test_catalog_writers_roundtrip(tmp_path):
    n_pix, field_deg = 8, 0.5
    k, g1, g2 = _constant_planes(n_pix, [(0.1, 0.02, 0.01)])
    z = np.linspace(0, 1, 101)
    cat = survey.mock_catalog(k, g1, g2, [1.0], field_deg, z, survey.smail_nz(z, 0.5), galaxies_per_arcmin2=2.0,
                              sigma_e=0.26, seed=0)
    survey.write_catalog_hdf5(tmp_path / "cat.h5", cat, settings={"sigma_e": 0.26}, seed=0)
    survey.write_catalog_fits(tmp_path / "cat.fits", cat)
    assert not list(tmp_path.glob("*.tmp*"))  # the temporary files were renamed
    with h5py.File(tmp_path / "cat.h5", "r") as f:
        assert f.attrs["stage"] == "catalog"
        for name, col in cat.items():
            np.testing.assert_array_equal(f["catalog"][name][...], col)
        assert f["catalog/theta_x_deg"].attrs["unit"] == "deg"
    with fits.open(tmp_path / "cat.fits") as hdul:
        tab = hdul["CATALOG"].data
        for name, col in cat.items():
            np.testing.assert_array_equal(tab[name], col)


# ---------------------------------------------------------------------------
# FITS maps and sky coordinates
# ---------------------------------------------------------------------------


def _gnomonic_inverse(xi, eta, ra0, dec0):
    """Inverse gnomonic projection, Snyder (1987), Map Projections - A Working Manual, USGS PP 1395,
    gnomonic chapter (formulas from memory of that text)."""
    a0, d0 = np.deg2rad(ra0), np.deg2rad(dec0)
    rho = np.hypot(xi, eta)
    c = np.arctan(rho)
    dec = np.arcsin(np.cos(c) * np.sin(d0) + eta * np.sin(c) * np.cos(d0) / rho)
    ra = a0 + np.arctan2(xi * np.sin(c), rho * np.cos(d0) * np.cos(c) - eta * np.sin(d0) * np.sin(c))
    return np.rad2deg(ra) % 360, np.rad2deg(dec)


@pytest.mark.parametrize("ra0, dec0", [(150.0, 2.2), (10.0, -45.0), (300.0, 80.0)])
def test_fits_map_wcs_against_gnomonic_projection(tmp_path, ra0, dec0):
    n_pix, field_deg = 64, 5.0
    kappa = np.random.default_rng(0).standard_normal((n_pix, n_pix))
    path = tmp_path / "kappa.fits"
    survey.write_convergence_fits(path, kappa, field_deg, ra_deg=ra0, dec_deg=dec0, z_source=1.0)
    assert not list(tmp_path.glob("*.tmp*"))
    with fits.open(path) as hdul:
        np.testing.assert_array_equal(hdul[0].data, kappa)
        w = WCS(hdul[0].header)
        assert hdul[0].header["ZSOURCE"] == 1.0
    ii, jj = np.mgrid[0:n_pix, 0:n_pix]
    ra, dec = w.wcs_pix2world(jj.ravel(), ii.ravel(), 0)  # astropy: x = column index first
    # pixel centres of the map, theta = (k + 1/2) d - F/2; tangent-plane xi = -theta_x (RA to the left), eta = theta_y
    d = np.deg2rad(field_deg / n_pix)
    tx = (jj.ravel() + 0.5) * d - np.deg2rad(field_deg) / 2
    ty = (ii.ravel() + 0.5) * d - np.deg2rad(field_deg) / 2
    ra_ref, dec_ref = _gnomonic_inverse(-tx, ty, ra0, dec0)
    dra = (ra - ra_ref + 180) % 360 - 180
    np.testing.assert_allclose(dra * np.cos(np.deg2rad(dec_ref)), 0, atol=1e-9)
    np.testing.assert_allclose(dec, dec_ref, atol=1e-9)
    # the package's own conversion agrees with astropy
    ra_p, dec_p = survey.map_to_sky(tx, ty, ra0, dec0)
    np.testing.assert_allclose(((ra_p - ra + 180) % 360 - 180) * np.cos(np.deg2rad(dec)), 0, atol=1e-9)
    np.testing.assert_allclose(dec_p, dec, atol=1e-9)
    # orientation: RA decreases with column (to the right), Dec increases with row (common practice)
    row = ra.reshape(n_pix, n_pix)[n_pix // 2]
    assert np.all(((np.diff(row) + 180) % 360 - 180) < 0)
    assert np.all(np.diff(dec.reshape(n_pix, n_pix)[:, n_pix // 2]) > 0)


# ---------------------------------------------------------------------------
# Warnings
# ---------------------------------------------------------------------------


def test_flat_sky_and_box_repetition_warnings():
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        assert survey.check_flat_sky(5.0)
        assert survey.check_box_repetition(5.0, 3000.0, 500.0)  # 0.087 rad * 3000 = 262 < 500
    with pytest.warns(UserWarning, match="maps.field_deg: 12 deg exceeds 10 deg"):
        assert not survey.check_flat_sky(12.0)
    with pytest.warns(UserWarning, match="wider than the box"):
        assert not survey.check_box_repetition(10.0, 3000.0, 500.0)  # 0.1745 * 3000 = 524 > 500
