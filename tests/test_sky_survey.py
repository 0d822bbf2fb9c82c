"""The spherical observe and measure stages: noise, masks, FITS, statistics on HEALPix maps."""

from __future__ import annotations

import copy
import json
from pathlib import Path

import h5py
import healpy as hp
import numpy as np
import pytest
import yaml

from raytrace import config as rc
from raytrace.cli import main
from raytrace.sky.config import shells_settings
from raytrace.sky.pixels import pixel_window
from raytrace.sky.statistics import SkyMapSet, extrema_counts, moments, pdf, power_spectrum
from raytrace.snapshots import RHO_CRIT_1E10_MSUN_H_PER_MPC_H3

ROOT = Path(__file__).resolve().parents[1]
SPHERE = yaml.safe_load((ROOT / "config" / "sphere_small.yaml").read_text())


def sphere_config(**maps) -> dict:
    cfg = copy.deepcopy(SPHERE)
    cfg["maps"].update(maps)
    return rc.validate(cfg)


def uniform_lightcone(path: Path, omega_m: float, nside: int = 64, step: float = 64.0, chi_max: float = 2560.0):
    """Particles at every pixel centre and radial step, each with the mass of its volume element."""
    vec = np.array(hp.pix2vec(nside, np.arange(hp.nside2npix(nside)))).T
    chi = (np.arange(int(chi_max / step)) + 0.5) * step
    rho_m = omega_m * RHO_CRIT_1E10_MSUN_H_PER_MPC_H3
    with h5py.File(path, "w") as f:
        f["Coordinates"] = (chi[:, None, None] * vec[None]).reshape(-1, 3)
        f["Masses"] = np.repeat(rho_m * chi**2 * step * hp.nside2pixarea(nside), len(vec))
        f.attrs["Omega0"] = omega_m
        f.attrs["chi_max_mpc_h"] = chi_max
    return path


@pytest.fixture(scope="module")
def staged(tmp_path_factory):
    """shells (light cone) -> trace-sphere -> observe -> measure through the CLI, on a uniform light cone."""
    work = tmp_path_factory.mktemp("sky_stages")
    cfg = sphere_config(nside=64, method="born")
    cfg["shells"] = {**cfg["shells"], "kind": "lightcone", "files": str(work / "lc_{realization}.h5")}
    params = rc.model_parameters(cfg, "fiducial")
    uniform_lightcone(work / "lc_3.h5", params["Omega_m"])
    paths = {k: work / f"{k}.h5" for k in ("shells", "maps", "observed", "statistics")}
    trace_settings = {"cosmology": params, "maps": cfg["maps"], "sources": cfg["survey"]["sources"], "seed": cfg["seed"]}
    survey = {k: v for k, v in cfg["survey"].items() if k != "sources"}
    fits = work / "kappa.fits"
    for args in (
        ["shells", "--model", "fiducial", "--realization", "3", "--settings", json.dumps(shells_settings(cfg, params)),
         "--input", str(work / "lc_3.h5"), "--output", str(paths["shells"])],
        ["trace-sphere", "--model", "fiducial", "--realization", "3", "--settings", json.dumps(trace_settings),
         "--shells", str(paths["shells"]), "--output", str(paths["maps"])],
        ["observe", "--realization", "3", "--settings", json.dumps({"survey": survey, "seed": cfg["seed"]}),
         "--maps", str(paths["maps"]), "--output", str(paths["observed"]), "--fits", str(fits)],
        ["measure", "--settings", json.dumps({"statistics": cfg["statistics"]}), "--maps", str(paths["observed"]),
         "--output", str(paths["statistics"])],
    ):
        assert main(args) == 0, args[0]
    return cfg, paths, fits


def test_stages_write_their_layouts(staged):
    cfg, paths, fits = staged
    npix = hp.nside2npix(64)
    with h5py.File(paths["maps"]) as f:
        assert f.attrs["geometry"] == "sphere" and f.attrs["nside"] == 64
        assert json.loads(f.attrs["map_labels"]) == ["z0.50", "z1.00", "bin0", "bin1", "cmb"]
        assert f["kappa"].shape == (2, npix) and f["bins/kappa"].shape == (2, npix) and f["cmb/kappa"].shape == (1, npix)
        # a uniform light cone: the galaxy maps vanish; the CMB map is the Gaussian completion alone
        assert np.abs(f["kappa"][...]).max() < 1e-5 and np.abs(f["bins/kappa"][...]).max() < 1e-5
        assert f["cmb/kappa"][...].std() > 1e-3
        assert f["cmb"].attrs["z_source"] == pytest.approx(1090, abs=5)  # last scattering (camb zstar)
        assert set(json.loads(f.attrs["shear_consistency"])["cmb"]) >= {"relative_rms", "e_mismatch", "b_over_e"}
    with h5py.File(paths["statistics"]) as f:
        assert set(f) == {"power_spectrum", "pdf", "moments", "peaks", "minima"}
        g = f["power_spectrum/unsmoothed"]
        assert g["values"].shape == (15, 6)  # 5 maps: 5 autos and 10 cross spectra
        assert json.loads(g.attrs["entries"])[:2] == ["z0.50", "z0.50xz1.00"]
        assert set(f["peaks"]) == {"smoothing_60arcmin", "smoothing_120arcmin"}


def test_shape_noise_and_masks_on_the_sphere(staged):
    # The per-pixel noise rms of each component is sigma_e / sqrt(n_gal Omega_pix) (Kaiser 1992;
    # sigma_e per component); smoothing reduces it as sum (2l+1) N_l b_l^2 / (4 pi).
    cfg, paths, fits = staged
    noise = cfg["survey"]["noise"]
    omega_arcmin2 = hp.nside2pixarea(64, degrees=True) * 3600
    with h5py.File(paths["observed"]) as f:
        mask = f["mask"][...].astype(bool)
        kappa, g1 = f["kappa"][...], f["gamma1"][...]
        fractions = f.attrs["galaxies_per_arcmin2"] / noise["galaxies_per_arcmin2"]
        assert f.attrs["valid_fraction"] == pytest.approx(mask.mean())
        for b, frac in enumerate(fractions[:4]):
            expected = noise["sigma_e"] / np.sqrt(noise["galaxies_per_arcmin2"] * frac * omega_arcmin2)
            assert f["noise_sigma"][b] == pytest.approx(expected, rel=1e-12)
            assert kappa[b][mask].std() == pytest.approx(expected, rel=0.03)
            assert g1[b][mask].std() == pytest.approx(expected, rel=0.03)
            assert np.all(kappa[b][~mask] == 0)
            assert f["kappa_smoothed"][0, b][mask].std() == pytest.approx(f["noise_sigma_smoothed"][0, b], rel=0.15)
        assert f["noise_sigma"][4] == 0  # the CMB-lensing map has no shape noise
        # the galactic band removes 1 - sin(20 deg) of the sky, the holes a little more
        parts = json.loads(f.attrs["mask_parts"])
        assert parts["band"] == pytest.approx(1 - np.sin(np.deg2rad(20)), abs=0.01)
        assert parts["total"] < parts["band"]
    # the HEALPix FITS holds the same maps, masked pixels UNSEEN (healpy.read_map, the reference reader)
    maps = hp.read_map(fits, field=None)
    assert maps.shape == kappa.shape
    assert np.allclose(maps[:, mask], kappa[:, mask], rtol=1e-6)
    assert np.all(maps[:, ~mask] == hp.UNSEEN)


def gaussian_field(cl, nside, seed):
    np.random.seed(seed)
    return hp.synfast(cl, nside, lmax=len(cl) - 1)


def test_master_power_spectrum_recovers_the_input(tmp_path):
    # MASTER (Hivon et al. 2002) is unbiased for spectra constant within bins: Gaussian fields
    # with a smooth spectrum, a galactic band and holes, pixel-window deconvolution on.
    from raytrace.sky.survey import build_mask

    nside = 64
    lmax = 3 * nside - 1
    ell = np.arange(lmax + 1.0)
    cl = np.where(ell >= 2, 1e-7 / (ell + 20.0), 0.0)
    w = pixel_window(nside)
    mask, _ = build_mask({"band": {"half_width_deg": 15.0}, "holes": {"per_deg2": 0.01, "r_min_arcmin": 60,
                          "r_max_arcmin": 180}}, nside, seed=3)
    settings = {"ell_edges": [10, 30, 60, 100, 128], "pixel_window": True, "mask_correction": "master"}
    values = []
    for s in range(12):
        ms = SkyMapSet(gaussian_field(cl * w**2, nside, s)[None], mask, nside)
        values.append(power_spectrum(ms, settings).values[0])
    values = np.array(values)
    truth = np.array([cl[a:b].mean() for a, b in zip(settings["ell_edges"][:-1], settings["ell_edges"][1:])])
    ratio = values.mean(axis=0) / truth
    err = values.std(axis=0, ddof=1) / np.sqrt(len(values)) / truth
    assert np.all(np.abs(ratio - 1) < np.maximum(0.03, 3 * err)), (ratio, err)
    # f_sky alone is biased by the mask's mode coupling where the spectrum is steep
    steep = np.where(ell >= 2, 1e-7 * (ell + 1.0) ** -2.5, 0.0)
    ms = SkyMapSet(gaussian_field(steep, nside, 99)[None], mask, nside)
    fsky = power_spectrum(ms, {**settings, "mask_correction": "fsky", "pixel_window": False}).values[0]
    master = power_spectrum(ms, {**settings, "pixel_window": False}).values[0]
    truth = np.array([steep[a:b].mean() for a, b in zip(settings["ell_edges"][:-1], settings["ell_edges"][1:])])
    assert abs(master[-1] / truth[-1] - 1) < abs(fsky[-1] / truth[-1] - 1)


def test_gaussian_field_statistics_on_the_sphere():
    # Gaussian random field (healpy.synfast) with a Gaussian beam of 2 deg FWHM, nside 256:
    # peaks per sr sigma2^2 / (8 sqrt(3) pi sigma1^2) (Bond & Efstathiou 1987), minima the same
    # by symmetry; sigma0^2 = sum (2l+1) C_l / 4 pi, sigma1^2 = sum (2l+1) l(l+1) C_l / 4 pi
    # (e.g. Bardeen et al. 1986 on the sphere); the PDF is the unit Gaussian in nu; zero skewness.
    nside = 256
    lmax = 3 * nside - 1
    ell = np.arange(lmax + 1.0)
    cl = np.where(ell >= 2, 1e-6 * hp.gauss_beam(np.deg2rad(2.0), lmax=lmax) ** 2, 0.0)
    field = gaussian_field(cl, nside, 5)
    mask = np.ones(field.size, dtype=bool)
    ms = SkyMapSet(field[None], mask, nside)
    s0 = np.sum((2 * ell + 1) * cl) / (4 * np.pi)
    s1 = np.sum((2 * ell + 1) * ell * (ell + 1) * cl) / (4 * np.pi)
    s2 = np.sum((2 * ell + 1) * (ell * (ell + 1)) ** 2 * cl) / (4 * np.pi)
    expected_deg2 = s2 / (8 * np.sqrt(3) * np.pi * s1) * (np.pi / 180) ** 2
    for name, kind in (("peaks", "max"), ("minima", "min")):
        m = extrema_counts(ms, {"binning": "nu", "min": -10, "max": 10, "bins": 1}, name, kind)
        assert m.values[0, 0] == pytest.approx(expected_deg2, rel=0.05), name
    mom = moments(ms, {})
    names = [e.split(":")[0] for e in mom.entries]
    assert mom.values[names.index("sigma0_sq"), 0] == pytest.approx(s0, rel=0.05)
    assert mom.values[names.index("sigma1_sq"), 0] == pytest.approx(s1, rel=0.05)
    assert abs(mom.values[names.index("skewness"), 0]) < 0.05
    p = pdf(ms, {"binning": "nu", "min": -3, "max": 3, "bins": 6})
    from scipy.stats import norm

    edges = p.bin_edges
    expected = np.diff(norm.cdf(edges)) / np.diff(edges)
    assert np.allclose(p.values[0], expected, rtol=0.05)


def test_user_healpix_shells_are_regraded(tmp_path):
    # shells.kind healpix: a user file in the shell layout, NESTED at nside 16, read at the
    # maps' nside 32 (healpy.ud_grade, the reference, which keeps the mean of a density map)
    cfg = sphere_config()
    cfg["maps"]["nside"] = 32
    cfg["shells"] = {**cfg["shells"], "kind": "healpix", "files": str(tmp_path / "user_{realization}.h5")}
    params = rc.model_parameters(cfg, "fiducial")
    rng = np.random.default_rng(8)
    delta = rng.standard_normal((3, hp.nside2npix(16))) * 0.1
    user = tmp_path / "user_0.h5"
    with h5py.File(user, "w") as f:
        f["delta"] = delta
        f["chi_lo_mpc_h"] = [0.0, 500.0, 1000.0]
        f["chi_hi_mpc_h"] = [500.0, 1000.0, 1500.0]
        f.attrs["ordering"] = "NESTED"
    out = tmp_path / "shells.h5"
    assert main(["shells", "--model", "fiducial", "--realization", "0", "--settings",
                 json.dumps(shells_settings(cfg, params)), "--input", str(user), "--output", str(out)]) == 0
    with h5py.File(out) as f:
        assert f["delta"].shape == (3, hp.nside2npix(32))
        expected = hp.ud_grade(delta[1], 32, order_in="NESTED", order_out="RING")
        assert np.allclose(f["delta"][1], expected, rtol=1e-6, atol=1e-7)
        assert list(f["chi_hi_mpc_h"][...]) == [500.0, 1000.0, 1500.0]
        assert f["redshift"][2] == pytest.approx(float(rc.model_cosmology(cfg, "fiducial").redshift_at(1250.0)))
