"""Mass assignment (NGP, CIC, TSC): weights, mass conservation, windows and shot noise."""

from __future__ import annotations

import numpy as np
import pytest

from raytrace import demo
from raytrace.deposit import DEPOSIT_3D, DEPOSIT_PLANES, PLANE_AXES
from raytrace.snapshots import iter_chunks, read_header
from raytrace.spectra import aliased_shot_noise_factor, power_spectrum_3d

from test_cosmology_demo import realised_input_power


def tsc_weights(s):
    """Hockney & Eastwood 1988, eq. 5-93 (from memory): TSC weights at offsets -1, 0, +1 cells
    for a particle s cells from the nearest cell centre."""
    return np.array([0.5 * (0.5 - s) ** 2, 0.75 - s**2, 0.5 * (0.5 + s) ** 2])


@pytest.mark.parametrize("offset", [-0.5, -0.3, 0.0, 0.2, 0.49])
def test_tsc_weights_of_one_particle(offset):
    # one particle in a 3-D box: the weights are the outer product of the 1-D TSC weights
    grid, box = 8, 8.0
    pos = np.array([[3.5 + offset, 5.5 - offset / 2, 0.5 + offset]])  # near centres 3, 5 and 0
    out = np.zeros((grid, grid, grid))
    DEPOSIT_3D["tsc"](pos, np.ones(1), box, grid, out)
    wx, wy, wz = tsc_weights(offset), tsc_weights(-offset / 2), tsc_weights(offset)
    expected = np.zeros_like(out)
    for i, a in enumerate((2, 3, 4)):
        for j, b in enumerate((4, 5, 6)):
            for k, c in enumerate((7, 0, 1)):  # periodic: cell 0's lower neighbour is 7
                expected[a, b, c] = wx[i] * wy[j] * wz[k]
    # an offset of exactly -1/2 sits halfway between two centres: either one may be "nearest"
    if offset == -0.5:
        assert out.sum() == pytest.approx(1.0, abs=1e-14)
        assert np.abs(np.sort(out.ravel()) - np.sort(expected.ravel())).max() < 1e-12
    else:
        np.testing.assert_allclose(out, expected, atol=1e-14)


@pytest.mark.parametrize("assignment", ["ngp", "cic", "tsc"])
def test_assignment_conserves_mass(assignment):
    # Common practice: every scheme's weights sum to one, so the deposited mass is the particles'
    # mass, also for particles at the box edges (periodic wrap) and rounded up to the box side.
    rng = np.random.default_rng(3)
    box, grid, n_slabs = 50.0, 32, 5
    pos = rng.uniform(0, box, (20000, 3))
    pos[:3] = [[0.0, 0.0, 0.0], [box * (1 - 1e-16), 0.0, box * (1 - 1e-16)], [box, box, box]]
    mass = rng.uniform(0.5, 2.0, len(pos))
    planes = np.zeros((3, n_slabs, grid, grid))
    DEPOSIT_PLANES[assignment](pos, mass, box, grid, n_slabs, planes)
    for a in range(3):
        assert planes[a].sum() == pytest.approx(mass.sum(), rel=1e-12)
        # the line of sight is NGP: each slab holds exactly the mass of its particles
        slab = np.minimum((pos[:, a] * n_slabs / box).astype(int), n_slabs - 1)
        np.testing.assert_allclose(planes[a].sum(axis=(1, 2)), np.bincount(slab, mass, n_slabs), rtol=1e-12)
    cube = np.zeros((grid, grid, grid))
    DEPOSIT_3D[assignment](pos, mass, box, grid, cube)
    assert cube.sum() == pytest.approx(mass.sum(), rel=1e-12)
    assert cube.min() >= 0.0


@pytest.mark.parametrize("assignment", ["ngp", "cic", "tsc"])
def test_plane_deposit_is_the_3d_deposit_projected(assignment):
    # The plane kernel's transverse weights are the 3-D kernel's: with one slab, projecting the
    # 3-D deposit along each axis gives the plane, transposed to [iy, ix] (PLANE_AXES).
    rng = np.random.default_rng(4)
    box, grid = 20.0, 16
    pos = rng.uniform(0, box, (5000, 3))
    mass = rng.uniform(0.5, 2.0, len(pos))
    planes = np.zeros((3, 1, grid, grid))
    DEPOSIT_PLANES[assignment](pos, mass, box, grid, 1, planes)
    cube = np.zeros((grid, grid, grid))
    DEPOSIT_3D[assignment](pos, mass, box, grid, cube)
    for a, (ax, ay) in enumerate(PLANE_AXES):
        proj = cube.sum(axis=a)  # indexed by the two remaining box axes in increasing order
        expected = proj.T if ay > ax else proj  # -> [iy, ix] = [box axis ay, box axis ax]
        np.testing.assert_allclose(planes[a, 0], expected, rtol=1e-10, atol=1e-12)


@pytest.mark.parametrize("assignment", ["ngp", "cic", "tsc"])
def test_shot_noise_of_random_particles(assignment):
    # Jing 2005, ApJ 620, 559, eq. 20: the raw power of unclustered (Poisson) particles is the
    # aliased sum of W^2 over the images, 1/n times prod_i C_p(k_i) with C_1 = 1,
    # C_2 = 1 - 2/3 s^2, C_3 = 1 - s^2 + 2/15 s^4, s = sin(k_i Delta / 2).
    rng = np.random.default_rng(5)
    box, grid, n = 100.0, 48, 300_000
    pos = rng.uniform(0, box, (n, 3))
    edges = np.linspace(0.4, np.pi * grid / box, 7)
    k, p, modes = power_spectrum_3d(pos, np.ones(n), box, grid, edges, subtract_shot_noise=False,
                                    deconvolve=False, assignment=assignment)
    # the expectation binned over the same modes
    k1 = 2 * np.pi * np.fft.fftfreq(grid, d=box / grid)
    kr = 2 * np.pi * np.fft.rfftfreq(grid, d=box / grid)
    kk = (k1[:, None, None], k1[None, :, None], kr[None, None, :])
    c = np.broadcast_to(aliased_shot_noise_factor(kk, box / grid, assignment), (grid, grid, grid // 2 + 1))
    kmag = np.sqrt(kk[0] ** 2 + kk[1] ** 2 + kk[2] ** 2)
    w = np.full(grid // 2 + 1, 2.0)
    w[0] = w[-1] = 1.0
    wgrid = np.broadcast_to(w, c.shape)
    idx = np.digitize(kmag, edges) - 1
    expected = np.array([np.sum((wgrid * c)[idx == b]) / np.sum(wgrid[idx == b]) for b in range(len(edges) - 1)])
    expected *= box**3 / n
    # each bin holds > 800 independent modes (counted twice, with their conjugates): the mean
    # of exponentially distributed powers is then good to 3.5% (one sigma)
    assert np.all(modes > 1600)
    np.testing.assert_allclose(p / expected, 1.0, atol=0.12)
    # and with the expectation subtracted, nothing is left on average
    _, p_sub, _ = power_spectrum_3d(pos, np.ones(n), box, grid, edges, assignment=assignment, deconvolve=False)
    assert abs(np.sum(p_sub * modes) / np.sum(expected * modes)) < 0.03


MESH = 64


@pytest.fixture(scope="module")
def snapshot_and_input(suite):
    """The z = 0.5 demo particles, k bins up to 0.6 of the 64^3 mesh's Nyquist wavenumber, and
    camb's linear cb power on the snapshot's phases averaged over the same modes."""
    z = 0.5
    header = read_header(suite.snapshots[suite.snapshot_z.index(z)])
    pos = np.concatenate([c.positions for c in iter_chunks(header, [1])])
    edges = np.linspace(0.03, 0.6 * np.pi * MESH / suite.box, 10)
    lp = suite.cosmo.linear_power([z])
    expected = realised_input_power(demo.white_noise_modes(suite.n_particles, 11), suite.box,
                                    lambda kk: lp.cb(z, kk), edges)
    return pos, edges, expected


@pytest.mark.parametrize("assignment", ["ngp", "cic", "tsc"])
def test_window_corrected_spectrum_recovers_the_input(suite, snapshot_and_input, assignment):
    # The demo snapshot (128^3 particles, camb's linear cb spectrum at z = 0.5 on known phases)
    # measured on a coarse 64^3 mesh, up to 0.6 of the mesh Nyquist wavenumber where the window
    # matters: dividing by W^2 = prod sinc^(2p)(k_i Delta / 2) (Hockney & Eastwood 1988, ch. 5)
    # recovers the input within 10% for every scheme, while without it TSC loses more than
    # a quarter of the power in the last bin. (Aliasing, neglected, is a few per cent for NGP
    # there: Jing 2005.) Lattice initial conditions: no shot noise to subtract (common practice).
    pos, edges, expected = snapshot_and_input
    _, p, _ = power_spectrum_3d(pos, np.ones(len(pos)), suite.box, MESH, edges, subtract_shot_noise=False,
                                assignment=assignment)
    ratio = p / expected
    assert np.all(np.abs(ratio - 1) < 0.10), ratio
    if assignment == "tsc":
        _, raw, _ = power_spectrum_3d(pos, np.ones(len(pos)), suite.box, MESH, edges, subtract_shot_noise=False,
                                      deconvolve=False, assignment=assignment)
        assert raw[-1] / expected[-1] < 0.75
