"""Full-sky building blocks against healpy, published formulas and independent calculations."""

from __future__ import annotations

import itertools

import healpy as hp
import numpy as np
import pytest

from raytrace.sky.pixels import pixel_window, random_rotation, tangent_basis, vec2pix_ring_array
from raytrace.sky.shells import TiledSnapshot, contrast_from_sums
from raytrace.sky.statistics import coupling_sums
from raytrace.sky.survey import band_mask, hole_mask, smoothed_noise_sigma, tophat_beam


@pytest.mark.parametrize("nside", [1, 8, 256, 4096])
def test_compiled_vec2pix_equals_healpy(nside):
    # healpy.vec2pix (the HEALPix C++ library) is the reference, index for index; the sample
    # includes directions near the poles, on the equator and on the polar-cap boundary z = 2/3.
    rng = np.random.default_rng(nside)
    v = rng.standard_normal((200_000, 3))
    v[:1000, 2] = np.sign(v[:1000, 2]) * 1e4
    v[1000:2000, 2] = 0.0
    rho = np.hypot(v[2000:3000, 0], v[2000:3000, 1])
    v[2000:3000, 2] = rho * (2 / 3) / np.sqrt(1 - 4 / 9)
    out = np.empty(len(v), dtype=np.int64)
    vec2pix_ring_array(nside, v, out)
    assert np.array_equal(out, hp.vec2pix(nside, v[:, 0], v[:, 1], v[:, 2]))


def test_tiled_deposit_equals_brute_force_replicas():
    # Reference: every periodic image of every particle enumerated explicitly, rotated, and
    # binned with healpy.vec2pix + numpy.bincount (definition of the tiled shell).
    rng = np.random.default_rng(0)
    box, nside = 100.0, 32
    pos = rng.uniform(0, box, (3000, 3)).astype(np.float32).astype(np.float64)
    mass = rng.uniform(0.5, 1.5, len(pos))
    snap = TiledSnapshot.from_arrays(pos, mass, box, omega_m=0.3, blocks_per_side=4)
    rot, shift = random_rotation(rng), rng.uniform(0, box, 3)
    lo, hi = 150.0, 260.0
    ref = np.zeros(hp.nside2npix(nside))
    n_ref = 0
    m = int(np.ceil(hi / box)) + 1
    for rep in itertools.product(range(-m, m + 1), repeat=3):
        y = pos + shift + np.array(rep) * box
        r2 = (y**2).sum(axis=1)
        sel = (r2 >= lo**2) & (r2 < hi**2)
        d = y[sel] @ rot.T
        ref += np.bincount(hp.vec2pix(nside, *d.T), weights=mass[sel] / r2[sel], minlength=ref.size)
        n_ref += sel.sum()
    out, n = snap.deposit(lo, hi, rot, shift, nside)
    assert n == n_ref
    assert np.allclose(out, ref, rtol=1e-12, atol=1e-15)
    # a patch: identical inside the disc (minus a pixel's margin), nothing outside it
    axis, radius = np.array([0.0, 0.6, 0.8]), 0.3
    patch, _ = snap.deposit(lo, hi, rot, shift, nside, cone=(axis, radius))
    vec = np.array(hp.pix2vec(nside, np.arange(ref.size))).T
    inner = vec @ axis > np.cos(radius - hp.nside2resol(nside))
    assert np.allclose(patch[inner], ref[inner], rtol=1e-12, atol=1e-15)
    assert not patch[vec @ axis < np.cos(radius + hp.nside2resol(nside))].any()


def test_uniform_lattice_shells_have_zero_mean_contrast():
    # A uniform lattice tiled around the observer fills every shell with its mean density:
    # the sky average of sum(m / chi^2) / (Omega_pix * thickness) is the mean density
    # (the volume element is chi^2 dchi dOmega). Lattice sums approach the integral to the
    # lattice spacing over the shell thickness, here ~1e-3 (common practice).
    n, box, nside = 24, 100.0, 32
    q = (np.arange(n) + 0.5) * box / n
    pos = np.stack(np.meshgrid(q, q, q, indexing="ij"), axis=-1).reshape(-1, 3)
    snap = TiledSnapshot.from_arrays(pos, np.ones(1), box, omega_m=0.3)
    rng = np.random.default_rng(1)
    for lo, hi in ((300.0, 400.0), (700.0, 800.0)):
        sums, _ = snap.deposit(lo, hi, random_rotation(rng), rng.uniform(0, box, 3), nside)
        delta = contrast_from_sums(sums, lo, hi, snap.rho_dep, snap.rho_m)
        assert abs(delta.mean()) < 2e-3, delta.mean()


def test_random_rotations_are_uniform():
    # Shoemake (1992): a normalised Gaussian quaternion is uniform on SO(3); then R z is
    # uniform on the sphere: <n> = 0 and <n n^T> = I/3.
    rng = np.random.default_rng(2)
    rots = np.array([random_rotation(rng) for _ in range(20000)])
    assert np.allclose(np.einsum("nij,nkj->nik", rots, rots), np.eye(3), atol=1e-12)
    assert np.allclose(np.linalg.det(rots), 1.0)
    z = rots[:, :, 2]
    assert np.abs(z.mean(axis=0)).max() < 0.02
    assert np.allclose(z.T @ z / len(z), np.eye(3) / 3, atol=0.01)


def test_healpy_spin2_and_gradient_conventions_match_the_hessian():
    # The multi-plane tracer builds the covariant Hessian of the lens potential from healpy:
    # H_thth = lap/2 + Q, H_phph = lap/2 - Q, H_thph = U for E_lm = -sqrt((l+2)!/(l-2)!)/2 psi_lm,
    # and the gradient from alm2map_der1. Reference: finite differences of the potential
    # evaluated directly from scipy's spherical harmonics, with the covariant derivatives of
    # a scalar on the sphere in the (theta, phi) orthonormal basis (textbook differential
    # geometry, e.g. Arfken & Weber ch. 2).
    from scipy.special import sph_harm_y

    lmax, nside = 8, 16
    rng = np.random.default_rng(3)
    ell, m = hp.Alm.getlm(lmax)
    alm = rng.standard_normal(ell.size) + 1j * rng.standard_normal(ell.size)
    alm[m == 0] = alm[m == 0].real
    alm[ell < 2] = 0

    def psi(th, ph):
        return sum((1 if mm == 0 else 2) * (a * sph_harm_y(int(ll), int(mm), th, ph)).real
                   for a, ll, mm in zip(alm, ell, m))

    pix = np.array([5, 700, 1500, 3000])
    th, ph = hp.pix2ang(nside, pix)
    h = 1e-4
    p0 = psi(th, ph)
    d_th = (psi(th + h, ph) - psi(th - h, ph)) / (2 * h)
    d_ph = (psi(th, ph + h) - psi(th, ph - h)) / (2 * h)
    d_thth = (psi(th + h, ph) - 2 * p0 + psi(th - h, ph)) / h**2
    d_phph = (psi(th, ph + h) - 2 * p0 + psi(th, ph - h)) / h**2
    d_thph = (psi(th + h, ph + h) - psi(th + h, ph - h) - psi(th - h, ph + h) + psi(th - h, ph - h)) / (4 * h * h)
    s, c = np.sin(th), np.cos(th)
    h_tt, h_pp = d_thth, d_phph / s**2 + c / s * d_th
    h_tp = d_thph / s - c / s**2 * d_ph
    lf = np.arange(lmax + 1.0)
    e = hp.almxfl(alm, -0.5 * np.sqrt(np.maximum((lf + 2) * (lf + 1) * lf * (lf - 1), 0)))
    q, u = hp.alm2map_spin([e, 0 * e], nside, 2, lmax)
    lap = hp.alm2map(hp.almxfl(alm, -lf * (lf + 1)), nside, lmax=lmax)
    _, g_th, g_ph = hp.alm2map_der1(alm, nside, lmax=lmax)
    scale = np.abs(h_tt).max()
    assert np.allclose((lap / 2 + q)[pix], h_tt, atol=1e-5 * scale)
    assert np.allclose((lap / 2 - q)[pix], h_pp, atol=1e-5 * scale)
    assert np.allclose(u[pix], h_tp, atol=1e-5 * scale)
    assert np.allclose(g_th[pix], d_th, atol=1e-5 * scale)
    assert np.allclose(g_ph[pix], d_ph / s, atol=1e-5 * scale)
    # the basis used for the Cartesian fields: e_theta, e_phi are the derivatives of n
    n0 = np.array(hp.ang2vec(th, ph))
    et, ep = tangent_basis(n0)
    assert np.allclose(et, (np.array(hp.ang2vec(th + h, ph)) - np.array(hp.ang2vec(th - h, ph))) / (2 * h), atol=1e-7)
    assert np.allclose(ep * s[:, None], (np.array(hp.ang2vec(th, ph + h)) - np.array(hp.ang2vec(th, ph - h))) / (2 * h),
                       atol=1e-7)


def test_pixel_window_matches_pixel_averaging():
    # Definition (Górski et al. 2005): w_l^2 is the factor by which averaging over pixels
    # reduces the variance of a field of multipole l. Reference: a band-limited Gaussian
    # field at nside 1024 averaged into nside 64 pixels (healpy.synfast, healpy.ud_grade).
    w = pixel_window(64)
    rng = np.random.default_rng(4)
    lmax = 191
    for ell in (40, 120, 180):
        cl = np.zeros(lmax + 1)
        cl[ell] = 1.0
        ratios = []
        for _ in range(3):
            np.random.seed(int(rng.integers(1 << 30)))
            f = hp.synfast(cl, 1024, lmax=lmax)
            ratios.append(np.var(hp.ud_grade(f, 64)) / np.var(f))
        assert np.mean(ratios) == pytest.approx(w[ell] ** 2, rel=5e-3), ell
    # small-angle limit (common practice): 1 - w_l^2 grows as l(l+1) for l << nside
    w1024 = pixel_window(1024, lmax=100)
    assert (1 - w1024[50] ** 2) / (1 - w1024[25] ** 2) == pytest.approx(50 * 51 / (25 * 26), rel=0.01)


def test_mode_coupling_uses_wigner_symbols():
    # Reference: sympy's exact Wigner 3j symbols (Racah formula).
    from sympy.physics.wigner import wigner_3j

    w_ell = np.arange(1.0, 41.0)
    s = coupling_sums(w_ell, 18)
    for l1, l2 in ((0, 0), (7, 4), (12, 12), (18, 3)):
        ref = sum((2 * l3 + 1) * w_ell[l3] * float(wigner_3j(l1, l2, l3, 0, 0, 0)) ** 2 for l3 in range(40))
        assert s[l1, l2] == pytest.approx(ref, rel=1e-10)
        assert s[l2, l1] == pytest.approx(ref, rel=1e-10)


def test_tophat_beam_is_the_legendre_transform_of_a_disc():
    # b_l = 2 pi int W(theta) P_l(cos theta) sin theta dtheta for a disc of unit integral
    # (definition of the harmonic transfer of an isotropic kernel), by scipy quadrature.
    from scipy.integrate import quad
    from scipy.special import eval_legendre

    radius = np.deg2rad(2.0)
    b = tophat_beam(radius, 300)
    norm = 2 * np.pi * (1 - np.cos(radius))
    for ell in (0, 1, 10, 90, 300):
        ref = quad(lambda t: 2 * np.pi * eval_legendre(ell, np.cos(t)) * np.sin(t), 0, radius, limit=200)[0] / norm
        assert b[ell] == pytest.approx(ref, rel=1e-8, abs=1e-10)


def test_band_and_hole_masks_cover_the_expected_area():
    # A band |b| < b0 covers 4 pi sin(b0) (Archimedes' hat-box theorem); random holes form a
    # Boolean model with valid fraction exp(-rho pi <r^2>) (Stoyan, Kendall & Mecke 1995, ch. 3;
    # small holes, so the flat-disc area is used).
    nside = 256
    band = band_mask(nside, 20.0)
    assert band.mean() == pytest.approx(1 - np.sin(np.deg2rad(20.0)), abs=2e-3)
    pole = hp.ang2vec(np.deg2rad(90 - 27.12825), np.deg2rad(192.85948))
    vec = np.array(hp.pix2vec(nside, np.arange(band.size))).T
    assert np.all(band == (np.abs(vec @ pole) >= np.sin(np.deg2rad(20.0))))
    r_min, r_max, slope, density = 20.0, 60.0, 3.0, 0.3
    holes = hole_mask(nside, holes_per_deg2=density, r_min_arcmin=r_min, r_max_arcmin=r_max, slope=slope, seed=5)
    # <r^2> of dN/dr ~ r^-3 on [r_min, r_max]: (int r^-1 dr) / (int r^-3 dr)
    mean_r2 = np.log(r_max / r_min) / (0.5 * (r_min**-2 - r_max**-2))
    expected = np.exp(-density * np.pi * mean_r2 / 3600.0)
    assert holes.mean() == pytest.approx(expected, abs=0.01)
    assert np.array_equal(holes, hole_mask(nside, holes_per_deg2=density, r_min_arcmin=r_min, r_max_arcmin=r_max,
                                           slope=slope, seed=5))  # fixed per survey


def test_smoothed_noise_rms_formula():
    # White noise of pixel variance s^2 has N_l = s^2 Omega_pix; after a beam b_l its variance
    # is sum (2l+1) N_l b_l^2 / (4 pi) (e.g. Hivon et al. 2002). Checked on a noise map.
    from raytrace.sky.survey import smooth

    nside, sigma = 128, 1.0
    rng = np.random.default_rng(6)
    noise = rng.standard_normal(hp.nside2npix(nside)) * sigma
    for kernel, scale in (("gaussian", 60.0), ("tophat", 90.0)):
        measured = smooth(noise, [scale], kernel=kernel)[0].std()
        assert measured == pytest.approx(smoothed_noise_sigma(sigma, nside, scale, kernel), rel=0.02)
