"""Background, linear power and the demo suite against camb and perturbation theory."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.fft

from raytrace.cosmology import Cosmology
from raytrace.deposit import cic_3d
from raytrace import demo
from raytrace.snapshots import iter_chunks, read_header
from raytrace.spectra import power_spectrum_3d

from conftest import FIDUCIAL


@pytest.fixture(scope="module")
def cosmo():
    return Cosmology(**FIDUCIAL)


def test_comoving_distance_agrees_with_camb(cosmo):
    # Two independent libraries: astropy.cosmology and camb's background module.
    import camb

    pars = cosmo.camb_params()
    bg = camb.get_background(pars)
    z = np.array([0.1, 0.5, 1.0, 1.5, 2.4, 5.0])
    ours = cosmo.comoving_distance(z)
    theirs = bg.comoving_radial_distance(z) * cosmo.h  # Mpc -> Mpc/h
    assert np.allclose(ours, theirs, rtol=1e-3)


def test_omega_m_includes_neutrinos(cosmo):
    # Lesgourgues & Pastor 2006, Phys. Rep. 429, 307: Omega_nu h^2 = sum m_nu / 93.14 eV.
    assert cosmo.omnuh2 == pytest.approx(0.1 / 93.14, rel=0.01)
    # astropy's Om0 excludes neutrinos; with them the matter density is the configured one
    a = cosmo.astropy
    assert a.Om0 + cosmo.Omega_nu == pytest.approx(FIDUCIAL["Omega_m"], rel=1e-12)
    # at z = 0 these neutrinos are non-relativistic: astropy's Onu0 equals the matter-like value
    assert a.Onu0 == pytest.approx(cosmo.Omega_nu, rel=0.02)


def test_neutrino_suppression_of_linear_power(cosmo):
    # Hu, Eisenstein & Tegmark 1998, PRL 80, 5255: Delta P / P ~ -8 f_nu on small scales,
    # at fixed Omega_m and A_s (linear theory, total matter).
    massless = Cosmology(**(FIDUCIAL | {"m_nu_eV": 0.0}))
    k = np.array([1.0])
    p_nu = cosmo.linear_power([0.0]).total(0.0, k)
    p_0 = massless.linear_power([0.0]).total(0.0, k)
    suppression = p_nu / p_0 - 1.0
    assert suppression == pytest.approx(-8 * cosmo.f_nu, rel=0.25)


def test_linear_power_is_cold_matter_and_total(cosmo):
    # camb: total matter includes the (less clustered) neutrinos, so P_tot < P_cb on small
    # scales and P_tot ~ P_cb on scales above the free-streaming length (common practice).
    lp = cosmo.linear_power([0.0])
    assert lp.total(0.0, np.array([1.0]))[0] < lp.cb(0.0, np.array([1.0]))[0]
    assert lp.total(0.0, np.array([1e-3]))[0] == pytest.approx(lp.cb(0.0, np.array([1e-3]))[0], rel=0.01)


# ------------------------------------------------------------------------------------
def realised_input_power(noise_k, box, power, edges):
    """camb's P(k) on this seed's phases: P(k) |w_k|^2 / N^3, binned like the measurement."""
    n = noise_k.shape[0]
    k1 = 2 * np.pi * scipy.fft.fftfreq(n, d=box / n)
    kr = 2 * np.pi * scipy.fft.rfftfreq(n, d=box / n)
    kk = np.sqrt(k1[:, None, None] ** 2 + k1[None, :, None] ** 2 + kr[None, None, :] ** 2).ravel()
    w = np.full(kr.shape, 2.0)
    w[0] = w[-1] = 1.0
    weight = np.broadcast_to(w, (n, n, n // 2 + 1)).ravel()
    idx = np.digitize(kk, edges) - 1
    ok = (idx >= 0) & (idx < len(edges) - 1)
    white = np.abs(noise_k.ravel()) ** 2 / n**3
    nb = len(edges) - 1
    num = np.bincount(idx[ok], weights=(weight * white * power(np.maximum(kk, 1e-9)))[ok], minlength=nb)
    return num / np.bincount(idx[ok], weights=weight[ok], minlength=nb)


def test_demo_power_spectrum_matches_camb(suite):
    # The snapshot's 3-D power (our CIC + FFT, window deconvolved) against camb's linear
    # cold-matter spectrum, for k below half the particle Nyquist wavenumber, at z = 0.5
    # where second-order LPT is still close to linear (common practice). The comparison is
    # made on this seed's phases, so cosmic variance of the single box cancels.
    # Shot noise: the particles start on a lattice, whose discreteness noise is far below
    # the Poisson value 1/n until they mix (common practice for lattice initial
    # conditions); subtracting 1/n would remove power that is not there.
    z = 0.5
    i = suite.snapshot_z.index(z)
    header = read_header(suite.snapshots[i])
    pos = np.concatenate([c.positions for c in iter_chunks(header, [1])])
    k_nyq = np.pi * suite.n_particles / suite.box
    edges = np.linspace(0.03, k_nyq / 2, 12)
    k, p, _ = power_spectrum_3d(pos, np.ones(len(pos)), suite.box, 2 * suite.n_particles, edges,
                                subtract_shot_noise=False)
    lp = suite.cosmo.linear_power([z])
    noise_k = demo.white_noise_modes(suite.n_particles, 11)
    expected = realised_input_power(noise_k, suite.box, lambda kk: lp.cb(z, kk), edges)
    ratio = p / expected
    assert np.all(np.abs(ratio - 1) < 0.10), ratio


def test_second_order_lpt_skewness():
    # Bernardeau, Colombi, Gaztanaga & Scoccimarro 2002, Phys. Rep. 367, 1 (from memory):
    # for top-hat smoothing S3 = 34/7 - (n+3) in perturbation theory, and the Zel'dovich
    # approximation gives S3 = 4 - (n+3); 2LPT reproduces the exact tree level, so the
    # difference 2LPT - ZA is 6/7 whatever the spectrum and filter.
    cosmo = Cosmology(**FIDUCIAL)
    n, box, mesh, radius = 96, 256.0, 96, 20.0
    lp = cosmo.linear_power([0.0])
    noise = demo.white_noise_modes(n, 5)
    k1 = 2 * np.pi * scipy.fft.fftfreq(mesh, d=box / mesh)
    kr = 2 * np.pi * scipy.fft.rfftfreq(mesh, d=box / mesh)
    kk = np.sqrt(k1[:, None, None] ** 2 + k1[None, :, None] ** 2 + kr[None, None, :] ** 2)
    x = np.maximum(kk * radius, 1e-8)
    tophat = 3 * (np.sin(x) - x * np.cos(x)) / x**3
    s3 = {}
    for order in (1, 2):
        psi = demo.lpt_displacement(noise, box, lambda k: 0.16 * lp.cb(0.0, k), order)
        pos = demo.particle_positions(psi, box).astype(np.float64)
        rho = np.zeros((mesh, mesh, mesh))
        cic_3d(pos, np.ones(len(pos)), box, mesh, rho)
        d = scipy.fft.irfftn(scipy.fft.rfftn(rho / rho.mean() - 1) * tophat, s=rho.shape)
        s3[order] = np.mean(d**3) / np.mean(d**2) ** 2
    assert s3[2] - s3[1] == pytest.approx(6 / 7, abs=0.12), s3


def test_models_share_phases(tmp_path):
    # Paired simulations: the same white noise for every model; displacements then scale
    # with sqrt(P) mode by mode (linear order).
    base = Cosmology(**FIDUCIAL)
    high = Cosmology(**(FIDUCIAL | {"A_s": 2.1e-9 * 1.21}))
    noise = demo.white_noise_modes(32, 9)
    lp_b, lp_h = base.linear_power([0.0]), high.linear_power([0.0])
    psi_b = demo.lpt_displacement(noise, 256.0, lambda k: lp_b.cb(0.0, k), 1)
    psi_h = demo.lpt_displacement(noise, 256.0, lambda k: lp_h.cb(0.0, k), 1)
    assert np.allclose(psi_h, 1.1 * psi_b, rtol=1e-3, atol=1e-6)


def test_demo_snapshot_layout(suite):
    import h5py

    files = suite.snapshots[0]
    assert len(files) >= 2  # multi-file reading is always exercised
    with h5py.File(files[0]) as f:
        for key in ("BoxSize", "Redshift", "Time", "NumPart_ThisFile", "NumPart_Total", "MassTable",
                    "Omega0", "OmegaLambda", "HubbleParam", "NumFilesPerSnapshot"):
            assert key in f["Header"].attrs
        assert f["PartType1/Coordinates"].dtype == np.float32
    header = read_header(files)
    assert header.n_total[1] == suite.n_particles**3
    # particle mass: Omega_cb rho_crit V / N (rho_crit = 2.775e11 h^2 Msun/Mpc^3, PDG)
    m = suite.cosmo.Omega_cb * 27.7536627 * suite.box**3 / suite.n_particles**3
    assert header.mass_table[1] == pytest.approx(m, rel=1e-9)
