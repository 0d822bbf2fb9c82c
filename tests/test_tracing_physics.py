"""Ray-tracing physics against published formulas and independent calculations."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.fft

from raytrace.config import PlaneSchedule
from raytrace.cosmology import Cosmology
from raytrace.planes import potential_derivatives
from raytrace.snapshots import iter_chunks, read_header
from raytrace.spectra import assignment_window_squared, power_spectrum_3d
from raytrace.statistics.power_spectrum import binned_cross_spectrum, expected_binned_spectrum
from raytrace.tracing import H0_OVER_C, PlaneChoice, SlabKernel, trace

from conftest import FIDUCIAL

FIELD_DEG, PIXELS, N_REAL = 3.5, 256, 12
SOURCES = [0.5, 1.0]
#: planes nearer than this are left empty for the Limber check: there k = ell / chi
#: exceeds what the 0.5 Mpc/h planes (and the 3-D reference mesh) resolve
CHI_MIN = 256.0


@pytest.fixture(scope="module")
def traced(suite):
    """Born and multi-plane maps of the same realisations (paired plane choices)."""
    out = {"born": [], "multi-plane": [], "born_far": []}
    for r in range(N_REAL):
        for method in ("born", "multi-plane"):
            out[method].append(suite.trace(r, method=method, sources=SOURCES, field_deg=FIELD_DEG, pixels=PIXELS))
        out["born_far"].append(suite.trace(r, method="born", sources=SOURCES, field_deg=FIELD_DEG, pixels=PIXELS,
                                           chi_min=CHI_MIN))
    return out


def spectra(maps, key, edges):
    pix = np.deg2rad(FIELD_DEG) / PIXELS
    ell = binned_cross_spectrum(maps[0][key][0], None, pix, edges)[0]
    cl = np.array([[binned_cross_spectrum(m[key][i], None, pix, edges)[1] for i in range(len(SOURCES))] for m in maps])
    return ell, cl


@pytest.fixture(scope="module")
def snapshot_power(suite):
    """The simulation's own 3-D power (CIC, window deconvolved), shot noise kept: the planes hold it too."""
    mesh = 256
    edges = np.geomspace(2 * np.pi / suite.box, np.pi * mesh / suite.box, 50)
    out = []
    for files in suite.snapshots:
        h = read_header(files)
        pos = np.concatenate([c.positions for c in iter_chunks(h, [1])])
        k, p, n_modes = power_spectrum_3d(pos, np.ones(len(pos)), suite.box, mesh, edges, subtract_shot_noise=False)
        out.append(p)
    keep = n_modes > 0  # the lowest log bins hold no mode of the box
    return k[keep], np.array(out)[:, keep]


def plane_window(k, cell, assignment="cic"):
    """Power transfer of the planes' mass assignment on a mesh of spacing ``cell``, averaged over directions.

    The schemes are separable sinc^p per axis in amplitude, p = 1, 2, 3 for NGP, CIC, TSC
    (Hockney & Eastwood 1988, ch. 5), so the power goes as sinc^(2p) per axis. (The bilinear
    read-out at the rays is left out: the test stays at scales where it changes the power by
    a few per cent at most.)
    """
    phi = np.linspace(0, np.pi / 2, 64)
    kx, ky = np.outer(k, np.cos(phi)), np.outer(k, np.sin(phi))
    return assignment_window_squared((kx, ky), cell, assignment).mean(axis=1)


def limber(cosmo: Cosmology, ell, z_source, k, pk_snap, snap_z, cell, chi_min=CHI_MIN, assignment="cic"):
    r"""Limber (1953) / Kaiser (1992) convergence power, :math:`C_\ell = \int d\chi\, q^2/\chi^2\, P(\ell/\chi, z)`,

    with :math:`q = \tfrac32\Omega_m (H_0/c)^2 (1+z)\chi(\chi_s-\chi)/\chi_s`, P taken from the
    snapshot nearest in redshift (as the planes are), the plane window applied, and the
    integral starting at ``chi_min`` like the maps it is compared with.
    """
    chi_s = float(cosmo.comoving_distance(z_source))
    chi = np.linspace(chi_min, chi_s, 1500)
    z = cosmo.redshift_at(chi)
    q = 1.5 * cosmo.Omega_m * H0_OVER_C**2 * (1 + z) * chi * (chi_s - chi) / chi_s
    nearest = np.argmin(np.abs(z[:, None] - np.asarray(snap_z)[None, :]), axis=1)
    kk = np.asarray(ell)[:, None] / chi[None, :]
    p = np.empty_like(kk)
    for j in np.unique(nearest):
        cols = nearest == j
        p[:, cols] = np.exp(np.interp(np.log(kk[:, cols]), np.log(k), np.log(pk_snap[j])))
    w = plane_window(kk.ravel(), cell, assignment).reshape(kk.shape)
    return np.trapezoid(q**2 / chi**2 * p * w, chi, axis=1)


def test_born_power_matches_limber(suite, traced, snapshot_power):
    # Limber 1953 ApJ 117, 134; Kaiser 1992 ApJ 388, 272: the flat-sky, small-angle power.
    # The maps are finite patches, so the theory goes through the same estimator
    # (expected_binned_spectrum: exact window convolution, Wiener-Khinchin).
    # Resolved range: above the slab-thickness scale (k_perp >> 2 pi / 64 Mpc/h at
    # chi_min), below k = ell / chi_min = 3.1 h/Mpc (the reference mesh's Nyquist
    # wavenumber), where the plane window is still above 0.8.
    edges = np.array([250.0, 450.0, 800.0])
    ell, cl = spectra(traced["born_far"], "kappa", edges)
    k, pk = snapshot_power
    ell_theory = np.geomspace(5.0, 3.0e4, 300)
    pix = np.deg2rad(FIELD_DEG) / PIXELS
    # the planes hold total matter, f_cb * delta_cb (neutrinos unclustered in the demo suite)
    f_cb = 1.0 - suite.cosmo.f_nu
    import h5py

    with h5py.File(suite.plane_files[0]) as f:  # the window of the scheme the planes were made with
        assignment = str(f.attrs["assignment"])
    for i, zs in enumerate(SOURCES):
        theory_cl = f_cb**2 * limber(suite.cosmo, ell_theory, zs, k, pk, suite.snapshot_z, suite.box / suite.grid,
                                     assignment=assignment)
        _, theory = expected_binned_spectrum(ell_theory, theory_cl, PIXELS, pix, edges)
        mean = cl[:, i].mean(axis=0)
        err = cl[:, i].std(axis=0, ddof=1) / np.sqrt(N_REAL)
        ratio = mean / theory
        # within 10%, or within 2 standard errors of the realisation mean where that is larger
        tol = np.maximum(0.10, 2 * err / theory)
        print(f"z_s = {zs}: Born / Limber = {np.round(ratio, 3)} +- {np.round(err / theory, 3)}")
        assert np.all(np.abs(ratio - 1) < tol), (zs, ratio, err / theory)


# ------------------------------------------------------------------------------------
def periodic_born_setup(n_planes=3, grid=128, box=100.0, seed=3):
    """Planes at chi_k = k * chi_1 so that a field of L / chi_1 spans k whole periods at plane k."""
    cosmo = Cosmology(**FIDUCIAL)
    chi1 = 400.0
    chi = chi1 * np.arange(1, n_planes + 1)
    sched = PlaneSchedule(chi - 0.5, chi + 0.5, chi, cosmo.redshift_at(chi), np.zeros(n_planes, dtype=int))
    rng = np.random.default_rng(seed)
    fields = []
    for _ in range(n_planes):
        white = rng.standard_normal((grid, grid))
        ky = scipy.fft.fftfreq(grid)[:, None]
        kx = scipy.fft.rfftfreq(grid)[None, :]
        smooth = np.exp(-((kx**2 + ky**2) * (grid / 12.0) ** 2))  # keep power well below the Nyquist scale
        delta = scipy.fft.irfft2(scipy.fft.rfft2(white) * smooth, s=(grid, grid))
        fields.append(potential_derivatives(delta, box))
    choice = PlaneChoice(np.arange(n_planes), np.zeros(n_planes, int), np.zeros(n_planes, int),
                         np.zeros((n_planes, 2)), np.ones((n_planes, 2)))

    def load(snapshot, axis, slab, names):
        return [fields[snapshot][n] for n in names]

    field_deg = np.rad2deg(box / chi1)
    return cosmo, sched, choice, load, box, field_deg


def kaiser_squires(g1, g2):
    r"""Kaiser & Squires (1993) inversion on a periodic grid:
    :math:`\hat\kappa = [(\ell_x^2-\ell_y^2)\hat\gamma_1 + 2\ell_x\ell_y\hat\gamma_2]/\ell^2`."""
    n = g1.shape[0]
    ly = scipy.fft.fftfreq(n)[:, None]
    lx = scipy.fft.fftfreq(n)[None, :]
    l2 = lx**2 + ly**2
    l2[0, 0] = 1.0
    k = ((lx**2 - ly**2) * scipy.fft.fft2(g1) + 2 * lx * ly * scipy.fft.fft2(g2)) / l2
    k[0, 0] = 0.0
    return scipy.fft.ifft2(k).real


def test_kaiser_squires_inversion_of_born_shear():
    # Kaiser & Squires 1993, ApJ 404, 441: on a periodic field, convergence follows from shear
    # up to its mean. The rays land on plane-grid points, so no interpolation error enters.
    cosmo, sched, choice, load, box, field_deg = periodic_born_setup()
    pixels = 128
    maps = trace(cosmo, sched, choice, load, box_mpc_h=box, field_deg=field_deg, pixels=pixels,
                 source_redshifts=[float(cosmo.redshift_at(sched.chi_hi[-1]))], method="born")
    kappa = maps["kappa"][0] - maps["kappa"][0].mean()
    rec = kaiser_squires(maps["gamma1"][0], maps["gamma2"][0])
    rel = np.sqrt(np.mean((rec - kappa) ** 2) / np.mean(kappa**2))
    assert rel < 1e-3, rel
    # the sign convention matters: with gamma2 flipped the inversion fails
    bad = kaiser_squires(maps["gamma1"][0], -maps["gamma2"][0])
    assert np.sqrt(np.mean((bad - kappa) ** 2) / np.mean(kappa**2)) > 0.3


def test_born_weights_equal_lensing_kernel():
    # The Born convergence of a slab of mean contrast delta is
    # (3/2) Om (H0/c)^2 delta * int (1+z) chi (chi_s - chi) / chi_s dchi over the slab
    # (e.g. Bartelmann & Schneider 2001, Phys. Rep. 340, 291, eq. 6.14), here checked with an
    # independent quadrature (scipy.integrate.quad).
    from scipy.integrate import quad

    cosmo, sched, choice, load, box, field_deg = periodic_born_setup(n_planes=1)
    lo, hi = 300.0, 500.0
    thickness = hi - lo
    f = load(0, 0, 0, ("d2phi_dxx", "d2phi_dyy"))
    lap = f[0] + f[1]  # the plane stores lap(phi) = contrast * thickness
    delta = lap / thickness
    for chi_s in (hi, 420.0):  # a source behind the slab, and one inside it
        sched1 = PlaneSchedule(np.array([lo]), np.array([hi]), np.array([0.5 * (lo + hi)]),
                               cosmo.redshift_at(np.array([0.5 * (lo + hi)])), np.zeros(1, int))
        zs = float(cosmo.redshift_at(chi_s))
        # a field of L / chi_c degrees puts the rays on the plane's cell centres
        fd = np.rad2deg(box / (0.5 * (lo + hi)))
        maps = trace(cosmo, sched1, choice, load, box_mpc_h=box, field_deg=fd, pixels=128,
                     source_redshifts=[zs], method="born")
        chi_src = float(cosmo.comoving_distance(zs))
        integral = quad(lambda c: (1 + float(cosmo.redshift_at(c))) * c * (chi_src - c) / chi_src, lo,
                        min(hi, chi_src))[0]
        expected = 1.5 * cosmo.Omega_m * H0_OVER_C**2 * integral * delta
        assert np.allclose(maps["kappa"][0], expected, rtol=1e-4, atol=1e-6 * np.abs(expected).max())
    # thin slabs: the weight tends to the thin-lens value (1+z) chi (chi_s - chi) / chi_s * thickness
    thin = SlabKernel(cosmo, 2000.0).weight(999.5, 1000.5, np.array([1800.0]))[0]
    z = float(cosmo.redshift_at(1000.0))
    thin_lens = 1.5 * cosmo.Omega_m * H0_OVER_C**2 * (1 + z) * 1000.0 * 800.0 / 1800.0 * 1.0
    assert thin == pytest.approx(thin_lens, rel=1e-5)
