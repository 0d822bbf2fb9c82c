"""Lens planes: uniform matter, a point mass, the Poisson equation, species weighting."""

from __future__ import annotations

import numpy as np
import pytest

from raytrace.config import PlaneSchedule, plane_schedule
from raytrace.cosmology import Cosmology
from raytrace.hdf5 import atomic_h5
from raytrace.planes import planes_from_mass, potential_derivatives, slice_snapshot, write_planes
from raytrace.snapshots import read_header
from raytrace.snapshots.hdf5 import write_snapshot
from raytrace.tracing import PlaneChoice, PlaneFiles, choose_planes, lens_strength, trace

from conftest import FIDUCIAL


def lattice(n: int, box: float) -> np.ndarray:
    q = (np.arange(n) + 0.5) * box / n
    g = np.meshgrid(q, q, q, indexing="ij")
    return np.stack([a.ravel() for a in g], axis=1).astype(np.float32)


@pytest.mark.parametrize("method", ["multi-plane", "born"])
def test_uniform_lattice_gives_no_lensing(tmp_path, method):
    # Common practice: a homogeneous universe does not lens (the mean density is the
    # background the distances already describe), so kappa = gamma = 0 to rounding.
    cosmo = Cosmology(**FIDUCIAL)
    box, n, grid, thickness = 64.0, 64, 32, 16.0
    files = [tmp_path / f"lattice.{i}.hdf5" for i in range(2)]
    write_snapshot(files, {1: lattice(n, box)}, {1: 1.0}, box_mpc_h=box, redshift=0.5, omega_m=0.3,
                   omega_lambda=0.7, h=0.68)
    planes = slice_snapshot(read_header(files), grid=grid, thickness_mpc_h=thickness)
    assert np.abs(planes.delta).max() < 1e-5
    out = tmp_path / "planes.h5"
    with atomic_h5(out, stage="slice") as f:
        write_planes(f, planes)
    sched = plane_schedule(cosmo, thickness, 1.0, [0.5])
    with PlaneFiles([out]) as pf:
        choice = choose_planes(sched, pf.n_slabs, box, 1, 0, True)
        maps = trace(cosmo, sched, choice, pf, box_mpc_h=box, field_deg=1.0, pixels=64,
                     source_redshifts=[0.5, 1.0], method=method)
    for key in ("kappa", "gamma1", "gamma2", "omega"):
        assert np.abs(maps[key]).max() < 1e-5, key


def point_mass_plane(grid=512, box=200.0, mass=50.0, sigma=0.4):
    """A compact Gaussian blob of projected 'mass' (integral of delta * t) at the box centre."""
    x = (np.arange(grid) + 0.5) * box / grid - box / 2
    r2 = x[None, :] ** 2 + x[:, None] ** 2
    sigma_map = mass / (2 * np.pi * sigma**2) * np.exp(-r2 / (2 * sigma**2))
    return x, sigma_map, potential_derivatives(sigma_map, box)


def test_point_mass_deflection():
    # Schneider, Ehlers & Falco 1992, ch. 8: a point mass deflects by M / (2 pi r) in the units
    # of lap(phi) = Sigma. On a periodic plane the mean is removed, which adds the uniform
    # term -M r / (2 L^2); the square lattice of images adds nothing at linear order.
    grid, box, mass = 512, 200.0, 50.0
    x, _, d = point_mass_plane(grid, box, mass)
    row = grid // 2  # y just above the centre: y = +half a cell
    y0 = x[row]
    r = np.hypot(x, y0)
    alpha = np.hypot(d["dphi_dx"][row], d["dphi_dy"][row])
    expected = mass / (2 * np.pi * r) - mass * r / (2 * box**2)
    use = (r > 3.0) & (r < box / 4)
    assert np.allclose(alpha[use], expected[use], rtol=0.02)
    # and the deflection points towards the mass (dphi/dx > 0 to the right of it)
    assert np.all(d["dphi_dx"][row][(x > 3.0) & (x < box / 4)] > 0)


def test_point_mass_shear_and_convergence_profile():
    # For an axially symmetric lens gamma_t = mean kappa inside theta - kappa(theta)
    # (Schneider, Ehlers & Falco 1992, ch. 8); for a point mass of Born weight w, with
    # kappa = (w/2) Sigma, gamma_t = (w/2) M / (pi r^2) at comoving radius r = chi theta,
    # and kappa away from the centre is the mean-removed background -(w/2) M / L^2.
    cosmo = Cosmology(**FIDUCIAL)
    grid, box, mass = 512, 200.0, 50.0
    _, _, d = point_mass_plane(grid, box, mass)
    chi = np.array([600.0, 1000.0])
    chi_s = 1300.0
    # a thin lens slab at 600 Mpc/h (its Born weight is then the thin-lens one) and an empty one
    sched = PlaneSchedule(np.array([599.0, 601.0]), np.array([601.0, 1400.0]), chi, cosmo.redshift_at(chi),
                          np.array([0, 1]))
    choice = PlaneChoice(np.array([0, 1]), np.zeros(2, int), np.zeros(2, int), np.zeros((2, 2)), np.ones((2, 2)))
    empty = {k: np.zeros_like(v) for k, v in d.items()}

    def load(snapshot, axis, slab, names):
        return [(d if snapshot == 0 else empty)[n] for n in names]

    field_deg = np.rad2deg(60.0 / 600.0)  # 60 Mpc/h across at the lens
    pixels = 256
    zs = float(cosmo.redshift_at(chi_s))
    maps = trace(cosmo, sched, choice, load, box_mpc_h=box, field_deg=field_deg, pixels=pixels,
                 source_redshifts=[zs], method="born")
    w = lens_strength(cosmo, float(sched.z[0])) * 600.0 * (chi_s - 600.0) / chi_s
    theta = (np.arange(pixels) + 0.5) * np.deg2rad(field_deg) / pixels - np.deg2rad(field_deg) / 2
    tx, ty = np.meshgrid(theta, theta)
    phi = np.arctan2(ty, tx)
    g_t = -(maps["gamma1"][0] * np.cos(2 * phi) + maps["gamma2"][0] * np.sin(2 * phi))
    r = 600.0 * np.hypot(tx, ty)
    expected = 0.5 * w * mass / (np.pi * r**2)
    use = (r > 3.0) & (r < 25.0)
    assert np.allclose(g_t[use], expected[use], rtol=0.02)
    assert np.allclose(maps["kappa"][0][use], -0.5 * w * mass / box**2, rtol=0.02, atol=1e-3 * expected[use].min())


def test_poisson_equation_on_the_plane():
    # lap(phi) = Sigma minus its mean, exactly for the discrete spectral derivatives.
    rng = np.random.default_rng(0)
    sigma = rng.standard_normal((64, 64))
    d = potential_derivatives(sigma, 50.0)
    lap = d["d2phi_dxx"] + d["d2phi_dyy"]
    # the Nyquist modes are kept in the second derivatives, so the identity is exact
    assert np.allclose(lap, sigma - sigma.mean(), atol=1e-10)


def test_species_are_mass_weighted():
    # Planes hold total matter: depositing two species together equals the mass-weighted
    # sum of their planes (definition of the total density contrast).
    box, grid, n_slabs = 50.0, 32, 2
    rng = np.random.default_rng(1)
    m1 = rng.uniform(0, 1, (3, n_slabs, grid, grid))
    m2 = rng.uniform(0, 0.1, (3, n_slabs, grid, grid))
    omega_m = 0.3
    both = planes_from_mass(m1 + m2, (m1 + m2).sum() / 3, box, 0.0, omega_m)
    one = planes_from_mass(m1, m1.sum() / 3, box, 0.0, omega_m)
    two = planes_from_mass(m2, m2.sum() / 3, box, 0.0, omega_m)
    assert np.allclose(both.delta, one.delta + two.delta, atol=1e-6)
    assert both.deposited_fraction == pytest.approx(one.deposited_fraction + two.deposited_fraction)
