"""Source distributions through the tracer, and the neutrino signal in non-Gaussian statistics."""

from __future__ import annotations

import numpy as np
import pytest

from raytrace import survey
from raytrace.errors import RaytraceError
from raytrace.statistics import MapSet, build
from raytrace.statistics.power_spectrum import binned_cross_spectrum, expected_binned_spectrum
from raytrace.tracing import H0_OVER_C, PlaneFiles, SourceBin, choose_planes, trace

from test_tracing_physics import CHI_MIN, FIELD_DEG, PIXELS, snapshot_power  # noqa: F401 (a fixture)

NZ = {"nz": {"kind": "smail", "z0": 0.45, "alpha": 2.0, "beta": 1.5}, "z_max": 1.0, "z_points": 201,
      "bins": {"n_bins": 2}, "photoz_sigma": 0.05}


def traced(suite, realization, method, sources=(), bins=(), chi_min=0.0, field_deg=FIELD_DEG, pixels=PIXELS):
    """One realisation of the session suite with planes out to z = 1 (the n(z) grid's end)."""
    return suite.trace(realization, method=method, sources=sources, bins=bins, chi_min=chi_min,
                       field_deg=field_deg, pixels=pixels, z_max=1.0)


def test_born_bin_equals_weighted_sum_of_source_planes(suite):
    # The Born map is linear in the source kernel: the map of a distribution n(z) is the
    # n(z)-weighted sum of single-source maps (definition; e.g. Bartelmann & Schneider 2001).
    bins = survey.source_bins(NZ)
    sb = SourceBin.from_nz(bins.z, bins.nz[1])
    keep = sb.weights > 0
    zs = bins.z[keep]
    zs = zs[zs > 0]
    w = sb.weights[keep][-len(zs):]
    single = traced(suite, 0, "born", sources=zs, field_deg=1.0, pixels=64)
    binned = traced(suite, 0, "born", bins=[sb], field_deg=1.0, pixels=64)
    for key in ("kappa", "gamma1", "gamma2"):
        expected = np.tensordot(w, single[key], axes=1)
        assert np.allclose(binned[key][0], expected, rtol=1e-6, atol=1e-6 * np.abs(expected).max()), key


def test_multiplane_bin_is_the_weighted_sum_of_boundary_sources(suite):
    # Multi-plane bins are n(z)-weighted sources at the slab boundaries, each galaxy's weight
    # shared linearly between the two boundaries around it (our definition, see tracing.py).
    from raytrace.tracing import boundary_weights

    bins = survey.source_bins(NZ)
    sb = SourceBin.from_nz(bins.z, bins.nz[0])
    sched = suite.schedule(1.0)
    w = boundary_weights(sched.chi_hi, suite.cosmo.comoving_distance(sb.z), sb.weights)
    used = np.nonzero(w > 0)[0]
    z_edges = suite.cosmo.redshift_at(sched.chi_hi[used])
    single = traced(suite, 2, "multi-plane", sources=z_edges, field_deg=1.0, pixels=64)
    binned = traced(suite, 2, "multi-plane", bins=[sb], field_deg=1.0, pixels=64)
    assert w.sum() == pytest.approx(1.0, abs=1e-9) or w.sum() < 1.0  # galaxies in front of slab 0 do not lens
    for key in ("kappa", "gamma1", "gamma2", "omega"):
        expected = np.tensordot(w[used], single[key], axes=1)
        assert np.allclose(binned[key][0], expected, rtol=1e-6, atol=1e-6 * np.abs(expected).max()), key


def test_multiplane_bin_power_matches_born_bin(suite):
    # Post-Born corrections to the convergence power are at the per-cent level below
    # ell ~ 2000 (common practice; Hilbert et al. 2009). Pixel by pixel the maps differ by
    # ~10% because deflected rays sample the planes elsewhere; the spectra agree.
    bins = survey.source_bins(NZ)
    sbs = [SourceBin.from_nz(bins.z, bins.nz[i]) for i in range(2)]
    edges = np.geomspace(150, 2000, 6)
    pix = np.deg2rad(FIELD_DEG) / PIXELS
    born, multi = [], []
    for r in range(4):
        b = traced(suite, r, "born", bins=sbs)
        m = traced(suite, r, "multi-plane", bins=sbs)
        born.append([binned_cross_spectrum(b["kappa"][i], None, pix, edges)[1] for i in range(2)])
        multi.append([binned_cross_spectrum(m["kappa"][i], None, pix, edges)[1] for i in range(2)])
    ratio = np.mean(multi, axis=0) / np.mean(born, axis=0)
    assert np.all(np.abs(ratio - 1) < 0.03), ratio


def test_born_bin_power_matches_limber_with_nz_kernel(suite, snapshot_power):  # noqa: F811
    # Limber (1953), Kaiser (1992) with the n(z) lensing kernel
    # q(chi) = 3/2 Om (H0/c)^2 (1+z) chi int dchi' n(chi') (chi' - chi)/chi'.
    bins = survey.source_bins(NZ)
    sb = SourceBin.from_nz(bins.z, bins.nz[1])
    n_real = 10
    edges = np.array([250.0, 450.0, 800.0])
    pix = np.deg2rad(FIELD_DEG) / PIXELS
    cls = []
    for r in range(n_real):
        m = traced(suite, r, "born", bins=[sb], chi_min=CHI_MIN)
        cls.append(binned_cross_spectrum(m["kappa"][0], None, pix, edges)[1])
    cls = np.array(cls)
    # the n(z) kernel as a weighted sum of single-source Limber kernels: C = int q_nz^2 / chi^2 P
    k, pk = snapshot_power
    cosmo = suite.cosmo
    chi_gal = cosmo.comoving_distance(sb.z)
    chi = np.linspace(CHI_MIN, chi_gal[sb.weights > 0].max(), 1500)
    z = cosmo.redshift_at(chi)
    eff = np.array([np.sum(sb.weights * np.clip(chi_gal - c, 0, None) / np.maximum(chi_gal, 1e-9)) for c in chi])
    q = 1.5 * cosmo.Omega_m * H0_OVER_C**2 * (1 + z) * chi * eff
    ell_t = np.geomspace(5.0, 3.0e4, 300)
    near = np.argmin(np.abs(z[:, None] - np.asarray(suite.snapshot_z)[None, :]), axis=1)
    kk = ell_t[:, None] / chi[None, :]
    p = np.empty_like(kk)
    for j in np.unique(near):
        cols = near == j
        p[:, cols] = np.exp(np.interp(np.log(kk[:, cols]), np.log(k), np.log(pk[j])))
    from test_tracing_physics import plane_window

    win = plane_window(kk.ravel(), suite.box / suite.grid).reshape(kk.shape)
    cl_theory = (1 - cosmo.f_nu) ** 2 * np.trapezoid(q**2 / chi**2 * p * win, chi, axis=1)
    _, theory = expected_binned_spectrum(ell_t, cl_theory, PIXELS, pix, edges)
    ratio = cls.mean(axis=0) / theory
    err = cls.std(axis=0, ddof=1) / np.sqrt(n_real) / theory
    print(f"n(z) bin: Born / Limber = {np.round(ratio, 3)} +- {np.round(err, 3)}")
    assert np.all(np.abs(ratio - 1) < np.maximum(0.10, 2 * err)), (ratio, err)


def test_nz_without_support_behind_the_first_plane_is_rejected(suite):
    z = np.linspace(0.0, 0.02, 50)  # all galaxies in front of the first slab's far edge
    with pytest.raises(RaytraceError, match="no support beyond the first lens plane"):
        traced(suite, 0, "born", bins=[SourceBin.from_nz(z, np.ones_like(z))], field_deg=0.5, pixels=16)


# ------------------------------------------------------------------------------------
# 6 deg is 240 Mpc/h at z = 1: the widest field the 256 Mpc/h box serves without repetition
N_PAIRED, PAIRED_FIELD_DEG, PAIRED_PIXELS = 24, 6.0, 384


@pytest.fixture(scope="module")
def paired_models(tmp_path_factory):
    """m_nu = 0 and 0.2 eV with the same phases, noisy observed maps of the same realisations."""
    from raytrace.config import plane_schedule
    from raytrace.cosmology import Cosmology
    from raytrace.demo import generate_model
    from raytrace.hdf5 import atomic_h5
    from raytrace.planes import slice_snapshot, write_planes
    from raytrace.snapshots import read_header

    from conftest import FIDUCIAL

    root = tmp_path_factory.mktemp("paired")
    zs = [0.0, 0.5, 1.0]
    out = {}
    for mnu in (0.0, 0.2):
        cosmo = Cosmology(**(FIDUCIAL | {"m_nu_eV": mnu}))
        snaps = generate_model(cosmo, box_mpc_h=256.0, particles_per_side=96, snapshot_redshifts=zs, seed=3,
                               directory=root / f"m{mnu}")
        files = []
        for i, s in enumerate(snaps):
            path = root / f"m{mnu}_planes_{i}.h5"
            with atomic_h5(path, stage="slice") as f:
                write_planes(f, slice_snapshot(read_header(s), grid=384, thickness_mpc_h=64.0))
            files.append(path)
        sched = plane_schedule(cosmo, 64.0, 1.0, zs)
        maps = []
        with PlaneFiles(files) as planes:
            for r in range(N_PAIRED):
                choice = choose_planes(sched, planes.n_slabs, 256.0, 5, r, True)
                kappa = trace(cosmo, sched, choice, planes, box_mpc_h=256.0, field_deg=PAIRED_FIELD_DEG,
                              pixels=PAIRED_PIXELS, source_redshifts=[1.0], method="born")["kappa"][0]
                obs = survey.observe_map(kappa, PAIRED_FIELD_DEG, {"noise": {"sigma_e": 0.26, "galaxies_per_arcmin2": 26},
                                                      "smoothing": {"scales_arcmin": [2.0]}}, seed=9, realisation=r)
                maps.append((obs, kappa))
        out[mnu] = maps
    return out


@pytest.mark.parametrize("name, settings", [
    # high peaks: where the suppressed small-scale power shows (low peaks are noise peaks)
    ("peaks", {"binning": "kappa", "edges": [0.02, 0.04, 0.08, 0.3]}),
    # small scales, where the neutrinos suppress the growth of structure most
    # on the noiseless convergence: with shape noise the signal-noise cross terms, which the
    # pairing does not cancel, need far more area than a unit test has (measured: 1.6 sigma
    # for 24 fields of 36 deg^2)
    ("bispectrum", {"ell_min": 300, "ell_max": 3000, "bins": 4, "configurations": ["equilateral"]}),
])
def test_neutrino_mass_changes_statistic_measurably(paired_models, name, settings):
    # The purpose of the tool: with paired seeds, the m_nu = 0.2 eV vs 0 difference of a
    # non-Gaussian statistic must exceed its scatter over realisations (common practice:
    # paired simulations cancel most of the cosmic variance).
    stat = build(name, settings)
    diffs = []
    for low, high in zip(paired_models[0.0], paired_models[0.2]):
        vals = []
        for obs, clean in (low, high):
            maps = obs.smoothed if stat.smoothed else clean[None]
            ms = MapSet(maps=maps[:1] if stat.smoothed else maps, mask=obs.mask,
                        pixel_arcmin=PAIRED_FIELD_DEG * 60 / PAIRED_PIXELS, smoothing_arcmin=2.0 if stat.smoothed else 0.0,
                        noise_sigma=np.array([obs.noise_sigma_smoothed[0] if stat.smoothed else obs.noise_sigma_pix]),
                        bin_labels=("z1.00",))
            vals.append(np.nansum(stat.measure(ms).values))
        diffs.append(vals[1] - vals[0])
    diffs = np.array(diffs)
    significance = abs(diffs.mean()) / (diffs.std(ddof=1) / np.sqrt(len(diffs)))
    print(f"{name}: paired difference {diffs.mean():.4g} +- {diffs.std(ddof=1) / np.sqrt(len(diffs)):.2g}")
    assert significance > 3, significance
