"""Flat and spherical modes agree on the convergence power of small patches (ell > 500)."""

from __future__ import annotations

import healpy as hp
import numpy as np
import pytest

from raytrace.config import PlaneSchedule
from raytrace.statistics.power_spectrum import binned_cross_spectrum
from raytrace.sky.pixels import pixel_window
from raytrace.sky.shells import build_tiled, choose_shells, shell_schedule
from raytrace.tracing import SlabKernel

Z_SOURCE = 1.0
#: planes and shells nearer than this are left out in both modes: there l > 500 probes
#: k > 1 h/Mpc, where the planes' mass assignment and bilinear read-out (0.5 Mpc/h cells)
#: and the particles' discreteness differ between the two discretisations by several per cent
CHI_MIN = 1024.0


def sphere_patch_power(suite, *, nside, radius_deg, realizations, edges, axis=(1.0, 0.5)):
    """Born convergence power in a disc of the sky, from tiled shells of 128 Mpc/h.

    Pseudo-C_l of the disc (mean removed) divided by its sky fraction and by the HEALPix
    pixel window, averaged over the bins with (2l + 1) weights (the mode count, as on the
    flat sky). The f_sky correction is accurate where the spectrum changes little over the
    disc's harmonic width (2 pi / radius ~ 30), common practice.
    """
    cosmo = suite.cosmo
    chi_s = float(cosmo.comoving_distance(Z_SOURCE))
    full = shell_schedule(cosmo, 128.0, chi_s, suite.snapshot_z)
    far = full.chi_lo >= CHI_MIN - 1e-9
    sched = PlaneSchedule(*(getattr(full, f)[far] for f in ("chi_lo", "chi_hi", "chi", "z", "snapshot")))
    kernel = SlabKernel(cosmo, float(sched.chi_hi[-1]))
    centre = np.asarray(hp.ang2vec(*axis))
    radius = np.deg2rad(radius_deg)
    vec = np.array(hp.pix2vec(nside, np.arange(hp.nside2npix(nside)))).T
    disc = vec @ centre > np.cos(radius - np.deg2rad(0.5))
    lmax = 2 * nside
    ell = np.arange(lmax + 1.0)
    w2 = pixel_window(nside, lmax) ** 2
    out = []
    for r in range(realizations):
        choice = choose_shells(sched, suite.box, 5, r)
        kappa = np.zeros(hp.nside2npix(nside))
        for shell in build_tiled(sched, choice, suite.snapshots, nside, cone=(centre, radius)):
            k = shell.index
            kappa += kernel.weight(sched.chi_lo[k], sched.chi_hi[k], np.array([chi_s]))[0] * shell.delta
        field = np.where(disc, kappa - kappa[disc].mean(), 0.0)
        cl = hp.alm2cl(hp.map2alm(field, lmax=lmax, iter=1)) / disc.mean() / w2
        out.append([np.sum(((2 * ell + 1) * cl)[int(a) : int(b)]) / np.sum((2 * ell + 1)[int(a) : int(b)])
                    for a, b in zip(edges[:-1], edges[1:])])
    return np.array(out)


def flat_power(suite, *, realizations, edges, field_deg=3.5, pixels=256):
    pix = np.deg2rad(field_deg) / pixels
    out = []
    for r in range(realizations):
        m = suite.trace(r, method="born", sources=[Z_SOURCE], field_deg=field_deg, pixels=pixels, chi_min=CHI_MIN)
        out.append(binned_cross_spectrum(m["kappa"][0], None, pix, edges)[1])
    return np.array(out)


def compare(suite, *, nside, radius_deg, sphere_realizations, flat_realizations, edges):
    # the same simulation, traced by slab planes (flat) and by onion shells (sphere)
    flat = flat_power(suite, realizations=flat_realizations, edges=edges)
    sphere = sphere_patch_power(suite, nside=nside, radius_deg=radius_deg, realizations=sphere_realizations,
                                edges=edges)
    ratio = sphere.mean(axis=0) / flat.mean(axis=0)
    err = flat.std(axis=0, ddof=1) / np.sqrt(len(flat)) / flat.mean(axis=0)
    print(f"sphere / flat patch power = {np.round(ratio, 3)} (flat mean +- {np.round(err, 3)}) in l bins {edges}")
    return ratio


def test_flat_and_sphere_agree_on_a_small_patch(suite):
    # Both geometries must give the same convergence power where the flat-sky approximation
    # holds (a 3.5 deg field, l > 500; e.g. Kilbinger et al. 2017 on flat- vs full-sky
    # spectra). Flat: 48 Born fields of 3.5 deg from the 64 Mpc/h planes; sphere: a 14 deg
    # disc (1.3 times their area) at nside 1024 from 128 Mpc/h shells of the same snapshots.
    edges = np.array([500.0, 700.0, 1000.0])
    ratio = compare(suite, nside=1024, radius_deg=14.0, sphere_realizations=1, flat_realizations=48, edges=edges)
    assert np.all(np.abs(ratio - 1) < 0.05), ratio


@pytest.mark.slow
def test_flat_and_sphere_agree_on_small_patches_full_size(suite):
    # The full-size version: nside 2048, l up to 1400, more area on both sides.
    edges = np.array([500.0, 700.0, 1000.0, 1400.0])
    ratio = compare(suite, nside=2048, radius_deg=15.0, sphere_realizations=3, flat_realizations=120, edges=edges)
    assert np.all(np.abs(ratio - 1) < 0.05), ratio
