"""Observational systematics: shear calibration, photometric-redshift errors, intrinsic alignments."""

from __future__ import annotations

import json
import re
import warnings

import h5py
import numpy as np
import pytest

from raytrace import survey, systematics
from raytrace.cli import main as raytrace_main
from raytrace.errors import RaytraceError
from raytrace.observe import apply_systematics, observe, read_traced
from raytrace.statistics import MapSet, build
from raytrace.statistics.power_spectrum import binned_cross_spectrum, expected_binned_spectrum
from raytrace.systematics import Nuisance
from raytrace.tracing import H0_OVER_C, AlignmentBin, PlaneSchedule, SourceBin, trace

from conftest import FIDUCIAL
from test_tracing_physics import CHI_MIN, FIELD_DEG, PIXELS, periodic_born_setup, plane_window, snapshot_power  # noqa: F401

NZ = {"nz": {"kind": "smail", "z0": 0.45, "alpha": 2.0, "beta": 1.5}, "z_max": 1.0, "z_points": 201,
      "bins": {"n_bins": 2}, "photoz_sigma": 0.05}


# ------------------------------------------------------------------------------------
# building blocks
def test_growth_factor_matches_camb():
    # camb's linear total-matter power at k = 0.01 h/Mpc (sub-horizon, above the scales where
    # the neutrinos' free streaming makes growth scale dependent by more than ~0.1%) grows as D^2
    from raytrace.cosmology import Cosmology

    for mnu in (0.0, 0.1):
        cosmo = Cosmology(**(FIDUCIAL | {"m_nu_eV": mnu}))
        z = np.array([0.25, 0.5, 1.0, 1.5, 2.4])
        lp = cosmo.linear_power(z, kmax_h_mpc=1.0)
        k = np.array([0.01])
        d_camb = np.array([np.sqrt(lp.total(zz, k)[0] / lp.total(0.0, k)[0]) for zz in z])
        d = systematics.growth_factor(cosmo, z)
        assert np.allclose(d, d_camb, rtol=2e-3), (mnu, d / d_camb - 1)
    assert systematics.growth_factor(cosmo, 0.0) == pytest.approx(1.0, abs=1e-12)


def test_nla_factor_convention():
    # Bridle & King 2007: F = C1 rho_crit Omega_m / D(z) with C1 rho_crit = 0.0134 (from memory);
    # the redshift power law ((1+z)/(1+z_pivot))^eta of Joachimi et al. 2011 is 1 at the pivot
    from raytrace.cosmology import Cosmology

    cosmo = Cosmology(**FIDUCIAL)
    assert systematics.nla_factor(cosmo, 0.0) == pytest.approx(0.0134 * 0.3, rel=1e-12)
    z = np.array([0.3, 0.62, 1.2])
    base = systematics.nla_factor(cosmo, z)
    tilted = systematics.nla_factor(cosmo, z, eta=2.0, z_pivot=0.62)
    assert np.allclose(tilted / base, ((1 + z) / 1.62) ** 2, rtol=1e-12)


def test_photoz_shift_and_stretch_move_mean_and_width():
    # The shift and stretch parametrisations (e.g. Hildebrandt et al. 2017; DES year 3, from
    # memory): n'(z) = n(zbar + (z - dz - zbar)/s)/s has mean zbar + dz and rms s * rms.
    z = np.linspace(0.0, 3.0, 3001)
    nz = np.exp(-0.5 * ((z - 1.0) / 0.15) ** 2)
    mean = lambda n: np.trapezoid(z * n, z) / np.trapezoid(n, z)  # noqa: E731
    rms = lambda n: np.sqrt(np.trapezoid((z - mean(n)) ** 2 * n, z) / np.trapezoid(n, z))  # noqa: E731
    moved, lost = systematics.photoz_nz(z, nz, shift=0.07, stretch=1.3)
    assert lost < 1e-6  # nothing leaves the grid (interpolation changes the integral by 2e-8)
    assert mean(moved) == pytest.approx(mean(nz) + 0.07, abs=1e-6)
    assert rms(moved) == pytest.approx(1.3 * rms(nz), rel=1e-4)
    assert np.trapezoid(moved, z) == pytest.approx(np.trapezoid(nz, z), rel=1e-12)
    same, _ = systematics.photoz_nz(z, nz, 0.0, 1.0)
    assert same is nz
    # galaxies pushed off the grid are counted and the rest renormalised
    _, lost = systematics.photoz_nz(z, nz, shift=2.0)
    assert lost == pytest.approx(0.5, abs=0.01)
    with pytest.raises(RaytraceError, match="off the n\\(z\\) grid"):
        systematics.photoz_nz(z, nz, shift=5.0)


def test_kaiser_squires_recovers_born_convergence():
    # Kaiser & Squires 1993, ApJ 404, 441: on a periodic field the convergence follows from
    # the shear up to its mean (the rays sit on plane-grid points: no interpolation error).
    cosmo, sched, choice, load, box, field_deg = periodic_born_setup()
    maps = trace(cosmo, sched, choice, load, box_mpc_h=box, field_deg=field_deg, pixels=128,
                 source_redshifts=[float(cosmo.redshift_at(sched.chi_hi[-1]))], method="born")
    kappa = maps["kappa"][0] - maps["kappa"][0].mean()
    rec = systematics.kaiser_squires(maps["gamma1"][0], maps["gamma2"][0])
    assert np.sqrt(np.mean((rec - kappa) ** 2) / np.mean(kappa**2)) < 1e-3
    # a constant (additive) shear has no E-mode convergence
    assert np.abs(systematics.kaiser_squires(maps["gamma1"][0] + 0.01, maps["gamma2"][0] - 0.02) - rec).max() < 1e-12


@pytest.mark.parametrize("method", ["born", "multi-plane"])
def test_alignment_maps_of_one_slab_follow_the_nla_model(method):
    # Nonlinear alignment model (Hirata & Seljak 2004; Bridle & King 2007): the intrinsic shear
    # is gamma^I = -F (kx^2 - ky^2, 2 kx ky)/k^2 delta, whose E-mode convergence is
    # kappa^I = -F delta. Galaxies spread through one slab of contrast delta therefore give
    # kappa^I = -delta int n F dz, and the Kaiser-Squires (1993) inverse of gamma^I is kappa^I.
    cosmo, _, choice, load, box, _ = periodic_born_setup(n_planes=1)
    lo, hi = 300.0, 500.0
    chi_c = 0.5 * (lo + hi)
    sched = PlaneSchedule(np.array([lo]), np.array([hi]), np.array([chi_c]), cosmo.redshift_at(np.array([chi_c])),
                          np.zeros(1, int))
    z = np.linspace(float(cosmo.redshift_at(lo)) + 1e-4, float(cosmo.redshift_at(hi)) - 1e-4, 101)
    nz = np.ones_like(z) / (z[-1] - z[0])
    f = systematics.nla_factor(cosmo, z)
    fd = np.rad2deg(box / chi_c)  # rays on the plane's cell centres
    z_far = float(cosmo.redshift_at(hi))  # a source behind the slab, lensed by it
    maps = trace(cosmo, sched, choice, load, box_mpc_h=box, field_deg=fd, pixels=128, source_redshifts=[z_far],
                 method=method, alignment_bins=[AlignmentBin(z, nz * f)])
    fxx, fyy = load(0, 0, 0, ("d2phi_dxx", "d2phi_dyy"))
    delta = (fxx + fyy) / (hi - lo)  # the plane's potential solves lap(phi) = delta * thickness
    expected = -np.trapezoid(nz * f, z) * delta
    if method == "born":
        assert np.allclose(maps["ia_kappa"][0], expected, rtol=1e-6, atol=1e-9 * np.abs(expected).max())
    else:
        # deflected rays read the plane a little off the cell centres (the lens is this slab)
        rel = np.std(maps["ia_kappa"][0] - expected) / np.std(expected)
        assert rel < 0.05, rel
    rec = systematics.kaiser_squires(maps["ia_gamma1"][0], maps["ia_gamma2"][0])
    k0 = maps["ia_kappa"][0] - maps["ia_kappa"][0].mean()
    assert np.sqrt(np.mean((rec - k0) ** 2) / np.mean(k0**2)) < (1e-3 if method == "born" else 0.05)
    # GI is negative: aligned galaxies point towards overdensities, lensing shears tangentially
    assert np.mean(maps["kappa"][0] * maps["ia_kappa"][0]) < 0


def test_catalog_mean_ellipticity_is_the_biased_signal():
    # STEP convention (Heymans et al. 2006): shear estimate (1 + m) gamma + c; for |g| <= 1 the
    # mean ellipticity equals the shear that acts on isotropic shapes (Seitz & Schneider 1997).
    n_pix, field_deg = 4, 0.1
    kap, gam1, gam2 = 0.1, 0.03, -0.02
    k = np.full((2, n_pix, n_pix), kap)
    g1 = np.full((2, n_pix, n_pix), gam1)
    g2 = np.full((2, n_pix, n_pix), gam2)
    ia = (np.full((n_pix, n_pix), -0.01), np.full((n_pix, n_pix), 0.004))
    z = np.linspace(0.8, 2.0, 121)
    m, c1, c2 = 0.08, 0.005, -0.003
    kwargs = dict(galaxies_per_arcmin2=4000.0, sigma_e=0.26, seed=1, realisation=0)
    plain = survey.mock_catalog(k, g1, g2, [0.8, 2.0], field_deg, z, np.ones_like(z), **kwargs)
    cat = survey.mock_catalog(k, g1, g2, [0.8, 2.0], field_deg, z, np.ones_like(z), shear_bias=(m, c1, c2),
                              alignment=ia, **kwargs)
    g = (gam1 + 1j * gam2) / (1 - kap)
    target = (1 + m) * (g + ia[0][0, 0] + 1j * ia[1][0, 0]) + (c1 + 1j * c2)
    e = cat["e1"] + 1j * cat["e2"]
    err = 0.26 / np.sqrt(len(e))
    assert len(e) > 100000
    assert abs(e.real.mean() - target.real) < 4 * err and abs(e.imag.mean() - target.imag) < 4 * err
    # paired: the same galaxies and intrinsic shapes; true shear columns unchanged
    for key in ("theta_x_deg", "z", "e1_int", "g1", "g2"):
        np.testing.assert_array_equal(cat[key], plain[key])
    np.testing.assert_allclose(cat["ia1"], ia[0][0, 0], rtol=1e-12)  # bilinear read of a constant map
    assert "ia1" not in plain


# ------------------------------------------------------------------------------------
# the trace and observe stages
def test_trace_stage_sees_only_what_changes_the_traced_maps():
    # our split (raytrace.systematics): nuisance values are the observe stage's, so changing
    # them never re-traces; values that leave the n(z) as it is are left out as well
    full = {"shear_bias": {"m": [0.1, 0.0], "c1": 0.01, "c2": 0.0},
            "photoz": {"shift": [0.0, 0.0], "stretch": 1.0, "derivative_step": 0.02, "offset": [0.02, 0.0]},
            "intrinsic_alignment": {"amplitude": 1.0, "eta": 0.5, "z_pivot": 0.62},
            "convergence_from_shear": True, "variants": {"a": {"shear_bias": {"m": 0.2}}}}
    assert systematics.trace_settings(full) == {"photoz": {"derivative_step": 0.02},
                                                "intrinsic_alignment": {"eta": 0.5, "z_pivot": 0.62}}
    assert systematics.trace_settings({"shear_bias": {"m": 0.1}, "photoz": {"shift": 0.0}}) is None
    assert systematics.trace_settings({"photoz": {"stretch": [1.0, 1.1]}}) == {"photoz": {"stretch": [1.0, 1.1]}}
    # a variant's values replace the nominal ones key by key
    merged = systematics.observe_settings(full, "a")
    assert merged["shear_bias"] == {"m": 0.2, "c1": 0.01, "c2": 0.0} and "variants" not in merged


def trace_cli(suite, out, systematics_settings=None, method="born", pixels=96, field_deg=2.0):
    settings = {"cosmology": FIDUCIAL, "seed": 3, "sources": NZ,
                "maps": {"field_deg": field_deg, "pixels": pixels, "method": method, "source_redshifts": [0.5, 1.0],
                         "randomize_planes": True}}
    if systematics_settings:
        settings["systematics"] = systematics_settings
    code = raytrace_main(["trace", "--model", "m", "--realization", "1", "--settings", json.dumps(settings),
                          "--planes", *map(str, suite.plane_files), "--output", str(out)])
    assert code == 0
    return out


TRACE_SYSTEMATICS = {"photoz": {"derivative_step": 0.03, "stretch_derivative_step": 0.1},
                     "intrinsic_alignment": {"eta": 1.0, "z_pivot": 0.62}}


@pytest.fixture(scope="module")
def traced_files(suite, tmp_path_factory):
    root = tmp_path_factory.mktemp("systematics")
    out = {}
    for method in ("born", "multi-plane"):
        out[method, "plain"] = trace_cli(suite, root / f"{method}_plain.h5", method=method)
        # planes end at z = 1 (NZ's z_max): moving the top bin up drops its tail, and says so
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            out[method, "sys"] = trace_cli(suite, root / f"{method}_sys.h5", TRACE_SYSTEMATICS, method=method)
        messages = [str(w.message) for w in caught]
        assert any(re.search(r"bin 1 shifted by \+0.03: 2.\d% of the galaxies fall off", m) for m in messages)
        assert any(re.search(r"bin 1 stretched by \+0.1: 2.\d% of the galaxies fall off", m) for m in messages)
    return out


@pytest.mark.parametrize("method", ["born", "multi-plane"])
def test_tracing_alignment_and_variants_leaves_lensing_maps_bit_for_bit(traced_files, method):
    with h5py.File(traced_files[method, "plain"]) as a, h5py.File(traced_files[method, "sys"]) as b:
        for key in ("kappa", "gamma1", "gamma2", "omega", "bins/kappa", "bins/gamma1", "bins/gamma2", "bins/omega",
                    "bins/nz"):
            np.testing.assert_array_equal(a[key][...], b[key][...], err_msg=key)
        assert set(b["bins/photoz_variants"]) == {"shift_plus", "shift_minus", "stretch_plus", "stretch_minus"}
        assert "intrinsic_alignment" in b["bins"] and "intrinsic_alignment" not in a["bins"]


def test_traced_variants_are_the_maps_of_the_moved_nz(suite, traced_files):
    # each variant is the bin traced with its n(z) moved (our definition): the same as tracing
    # the moved n(z) directly; its alignment maps likewise use the moved n(z) and eta
    from raytrace.config import plane_schedule
    from raytrace.tracing import PlaneFiles, choose_planes

    bins = survey.source_bins(NZ)
    sched = plane_schedule(suite.cosmo, suite.thickness, 1.0, suite.snapshot_z)
    f_ia = systematics.nla_factor(suite.cosmo, bins.z, eta=1.0, z_pivot=0.62)
    with h5py.File(traced_files["born", "sys"]) as f, PlaneFiles(suite.plane_files) as planes:
        choice = choose_planes(sched, planes.n_slabs, suite.box, 3, 1, True)
        for name, shift, stretch in (("shift_plus", 0.03, 1.0), ("stretch_minus", 0.0, 0.9)):
            nz = np.array([systematics.photoz_nz(bins.z, bins.nz[i], shift, stretch)[0] for i in range(2)])
            np.testing.assert_allclose(f[f"bins/photoz_variants/{name}/nz"][...], nz, rtol=1e-12)
            direct = trace(suite.cosmo, sched, choice, planes, box_mpc_h=suite.box, field_deg=2.0, pixels=96,
                           source_redshifts=[], method="born", source_bins=[SourceBin.from_nz(bins.z, n) for n in nz],
                           alignment_bins=[AlignmentBin(bins.z, n / np.trapezoid(n, bins.z) * f_ia) for n in nz])
            for key in ("kappa", "gamma1", "gamma2"):
                np.testing.assert_array_equal(f[f"bins/photoz_variants/{name}/{key}"][...],
                                              direct[key].astype(np.float32))
                np.testing.assert_array_equal(f[f"bins/photoz_variants/{name}/intrinsic_alignment/{key}"][...],
                                              direct["ia_" + key].astype(np.float32))
            assert f[f"bins/photoz_variants/{name}"].attrs["offset"] == shift
            # the variant really differs from the nominal bin
            assert not np.allclose(f[f"bins/photoz_variants/{name}/kappa"][...], f["bins/kappa"][...])


SURVEY = {"noise": {"enabled": True, "sigma_e": 0.26, "galaxies_per_arcmin2": 20},
          "mask": {"holes": {"per_deg2": 10, "r_min_arcmin": 0.5, "r_max_arcmin": 3.0}},
          "smoothing": {"kernel": "gaussian", "scales_arcmin": [2.0]}}
NULL = {"shear_bias": {"m": [0.0, 0.0], "c1": 0.0, "c2": 0.0},
        "photoz": {"offset": 0.0, "stretch_offset": [0.0, 0.0], "derivative_step": 0.03},
        "intrinsic_alignment": {"amplitude": 0.0}, "convergence_from_shear": False}


def observed_datasets(path):
    with h5py.File(path) as f:
        return {k: f[k][...] for k in ("kappa", "gamma1", "gamma2", "kappa_smoothed", "mask", "noise_sigma",
                                       "noise_sigma_smoothed")}


def test_null_nuisance_observes_bit_for_bit(traced_files, tmp_path):
    # With A_IA = 0 and m = c = offsets = 0 the observed maps and catalogs are exactly those of
    # a survey without a systematics section, and of maps traced without systematics.
    plain, sys_file = traced_files["born", "plain"], traced_files["born", "sys"]
    runs = {"today": (plain, SURVEY), "null": (sys_file, SURVEY | {"systematics": NULL}),
            "no_section": (sys_file, SURVEY)}
    out = {}
    for name, (maps, settings) in runs.items():
        observe(maps, tmp_path / f"{name}.h5", settings | {"catalog": {"galaxies_per_arcmin2": 2.0}}, seed=5,
                realization=1, catalog_paths=(tmp_path / f"{name}_cat.h5", tmp_path / f"{name}_cat.fits"))
        out[name] = observed_datasets(tmp_path / f"{name}.h5")
        with h5py.File(tmp_path / f"{name}_cat.h5") as f:
            out[name]["catalog"] = {k: f["catalog"][k][...] for k in f["catalog"]}
    for name in ("null", "no_section"):
        for key, value in out["today"].items():
            if key == "catalog":
                assert set(value) == set(out[name][key])
                for col in value:
                    np.testing.assert_array_equal(value[col], out[name][key][col], err_msg=col)
            else:
                np.testing.assert_array_equal(value, out[name][key], err_msg=f"{name}: {key}")
    # and a real nuisance value does change them (the comparison is not vacuous)
    observe(sys_file, tmp_path / "ia.h5", SURVEY | {"systematics": NULL | {"intrinsic_alignment": {"amplitude": 1.0}}},
            seed=5, realization=1)
    changed = observed_datasets(tmp_path / "ia.h5")
    assert not np.array_equal(changed["kappa"][2:], out["today"]["kappa"][2:])
    np.testing.assert_array_equal(changed["kappa"][:2], out["today"]["kappa"][:2])  # source planes untouched


def power(path, cross=True):
    with h5py.File(path) as f:
        ms = MapSet(maps=f["kappa"][...].astype(float), mask=f["mask"][...].astype(bool),
                    pixel_arcmin=float(f.attrs["pixel_arcmin"]), bin_labels=tuple(json.loads(f.attrs["map_labels"])))
    res = build("power_spectrum", {"ell_min": 300, "ell_max": 3000, "bins": 5, "cross": cross}).measure(ms)
    return dict(zip(res.entries, res.values))


@pytest.mark.parametrize("from_shear", [False, True])
def test_shear_bias_scales_power_as_one_plus_m_squared(traced_files, tmp_path, from_shear):
    # Multiplicative bias (Heymans et al. 2006): gamma -> (1+m) gamma + c, so the power of bin i
    # scales as (1+m_i)^2 and the cross power as (1+m_i)(1+m_j) (e.g. Huterer et al. 2006,
    # MNRAS 366, 101). A constant c has no E mode, so with the Kaiser-Squires convergence it
    # drops out (on an unmasked field: a mask makes c * mask structured, and it leaks). Noiseless
    # maps: the statement is about the signal.
    maps = traced_files["born", "sys"]
    settings = {"noise": {"enabled": False}} | ({} if from_shear else {"mask": SURVEY["mask"]})
    m = [0.05, -0.03]
    base = {"convergence_from_shear": from_shear}
    observe(maps, tmp_path / "zero.h5", settings | {"systematics": base}, seed=5, realization=1)
    biased = base | {"shear_bias": {"m": m, "c1": [0.002, -0.001], "c2": 0.003}}
    observe(maps, tmp_path / "biased.h5", settings | {"systematics": biased}, seed=5, realization=1)
    p0, p1 = power(tmp_path / "zero.h5"), power(tmp_path / "biased.h5")
    factor = {"z0.50": 1.0, "z1.00": 1.0, "bin0": 1 + m[0], "bin1": 1 + m[1]}
    for entry, value in p0.items():
        a, _, b = entry.partition("x")
        expected = factor[a] * factor[b or a]
        np.testing.assert_allclose(p1[entry] / value, expected, rtol=1e-5, err_msg=entry)
    # the additive bias shifts the mean observed shear by c (plus (1+m) times the signal's)
    with h5py.File(tmp_path / "zero.h5") as a, h5py.File(tmp_path / "biased.h5") as b:
        valid = a["mask"][...].astype(bool)
        shift = b["gamma1"][2][valid].mean() - (1 + m[0]) * a["gamma1"][2][valid].mean()
        assert shift == pytest.approx(0.002, abs=1e-6)
        assert json.loads(b.attrs["nuisance"])["m"] == m


def test_observe_variant_selection_and_its_errors(traced_files, tmp_path):
    maps = read_traced(traced_files["born", "sys"])
    nu = Nuisance.none(2).replace(offset=[0.0, -0.03], amplitude=0.5)
    applied = apply_systematics(maps, nu)
    var = next(v for v in maps.variants if v.name == "shift_minus")
    # bin 0 nominal + 0.5 IA; bin 1 from the shifted variant + 0.5 of that variant's IA
    np.testing.assert_allclose(applied.kappa[2], maps.kappa[2] + 0.5 * maps.alignment.kappa[0], rtol=1e-12)
    np.testing.assert_allclose(applied.gamma2[3], var.lensing.gamma2[1] + 0.5 * var.alignment.gamma2[1], rtol=1e-12)
    np.testing.assert_array_equal(applied.bin_nz[1][1], var.nz[1])
    with pytest.raises(RaytraceError, match=r"survey\.systematics\.photoz\.offset = 0\.05 .*re-trace"):
        apply_systematics(maps, Nuisance.none(2).replace(offset=[0.05, 0.0]), path="x.h5")
    plain = read_traced(traced_files["born", "plain"])
    with pytest.raises(RaytraceError, match=r"survey\.systematics\.intrinsic_alignment\.amplitude: x\.h5 holds no"):
        apply_systematics(plain, Nuisance.none(2).replace(amplitude=1.0), path="x.h5")
    with pytest.raises(RaytraceError, match="survey.systematics.shear_bias.m: 3 values for 2"):
        observe(traced_files["born", "sys"], tmp_path / "bad.h5", {"systematics": {"shear_bias": {"m": [0, 0, 0]}}},
                seed=1, realization=0)
    assert not (tmp_path / "bad.h5").exists()


# ------------------------------------------------------------------------------------
# physics on the session suite, against Limber integrals of the realised planes' power
N_REAL = 20
ELL_EDGES = np.array([250.0, 450.0, 800.0])
DZ = 0.05  # bin 0 moved up, bin 1 down (its top would leave the planes)


@pytest.fixture(scope="module")
def nz_setup(suite):
    bins = survey.source_bins(NZ)
    nominal = [bins.nz[i] for i in range(2)]
    moved = [systematics.photoz_nz(bins.z, bins.nz[0], DZ)[0], systematics.photoz_nz(bins.z, bins.nz[1], -DZ)[0]]
    f_ia = systematics.nla_factor(suite.cosmo, bins.z)
    return bins.z, nominal, moved, f_ia


@pytest.fixture(scope="module")
def born_spectra(suite, nz_setup):
    """Per realisation: lensing power of nominal and moved bins, alignment auto and cross power."""
    z, nominal, moved, f_ia = nz_setup
    sbs = [SourceBin.from_nz(z, n) for n in nominal + moved]
    abins = [AlignmentBin(z, n * f_ia) for n in nominal]
    pix = np.deg2rad(FIELD_DEG) / PIXELS
    rows = []
    for r in range(N_REAL):
        m = suite.trace(r, method="born", bins=sbs, alignment_bins=abins, chi_min=CHI_MIN, field_deg=FIELD_DEG,
                        pixels=PIXELS, z_max=1.0)
        row = {f"GG{i}": binned_cross_spectrum(m["kappa"][i], None, pix, ELL_EDGES)[1] for i in range(4)}
        for i, j in ((0, 0), (0, 1), (1, 1)):
            row[f"II{i}{j}"] = binned_cross_spectrum(m["ia_kappa"][i], None if i == j else m["ia_kappa"][j], pix,
                                                     ELL_EDGES)[1]
            row[f"GI{i}{j}"] = (binned_cross_spectrum(m["kappa"][i], m["ia_kappa"][j], pix, ELL_EDGES)[1]
                                + binned_cross_spectrum(m["ia_kappa"][i], m["kappa"][j], pix, ELL_EDGES)[1])
        rows.append(row)
    return {k: np.array([row[k] for row in rows]) for k in rows[0]}


@pytest.fixture(scope="module")
def limber_kernels(suite, snapshot_power, nz_setup):  # noqa: F811
    r"""Limber (1953) / Kaiser (1992) spectra :math:`C = \int W_a W_b / \chi^2\, P(\ell/\chi)\,d\chi` of
    the realised planes (the snapshots' own power, nearest snapshot, CIC plane window, total
    matter = f_cb delta_cb), through the map estimator's expectation."""
    z_grid, nominal, moved, _ = nz_setup
    cosmo = suite.cosmo
    k, pk = snapshot_power
    chi = np.linspace(CHI_MIN, float(cosmo.comoving_distance(1.0)), 1500)
    z = cosmo.redshift_at(chi)
    ell = np.geomspace(5.0, 3.0e4, 300)
    near = np.argmin(np.abs(z[:, None] - np.asarray(suite.snapshot_z)[None, :]), axis=1)
    kk = ell[:, None] / chi[None, :]
    p = np.empty_like(kk)
    for j in np.unique(near):
        cols = near == j
        p[:, cols] = np.exp(np.interp(np.log(kk[:, cols]), np.log(k), np.log(pk[j])))
    p *= plane_window(kk.ravel(), suite.box / suite.grid).reshape(kk.shape) * (1 - cosmo.f_nu) ** 2
    pix = np.deg2rad(FIELD_DEG) / PIXELS

    def lensing(nz):
        # q = 3/2 Om (H0/c)^2 (1+z) chi int n(chi') (chi' - chi)/chi' (Kaiser 1992)
        sb = SourceBin.from_nz(z_grid, nz)
        chi_gal = cosmo.comoving_distance(sb.z)
        eff = np.array([np.sum(sb.weights * np.clip(chi_gal - c, 0, None) / np.maximum(chi_gal, 1e-9)) for c in chi])
        return 1.5 * cosmo.Omega_m * H0_OVER_C**2 * (1 + z) * chi * eff

    # the alignment kernel -n(chi) F(z) (Hirata & Seljak 2004; Bridle & King 2007), with the
    # growth factor from camb (total matter at k = 0.01 h/Mpc), independent of the code's D(z)
    zg = np.linspace(0.0, 1.0, 21)
    lp = cosmo.linear_power(zg, kmax_h_mpc=1.0)
    d_camb = np.sqrt([lp.total(zz, np.array([0.01]))[0] / lp.total(0.0, np.array([0.01]))[0] for zz in zg])
    f_nla = 0.0134 * cosmo.Omega_m / np.interp(z, zg, d_camb)
    dz_dchi = np.gradient(z, chi)

    def alignment(nz):
        return -np.interp(z, z_grid, nz / np.trapezoid(nz, z_grid)) * dz_dchi * f_nla

    def spectrum(wa, wb):
        cl = np.trapezoid(wa * wb / chi**2 * p, chi, axis=1)
        sign = np.sign(cl[len(cl) // 2])  # the estimator's expectation is linear in C; GI < 0
        return sign * expected_binned_spectrum(ell, sign * cl, PIXELS, pix, ELL_EDGES)[1]

    return {"q": [lensing(n) for n in nominal], "q_moved": [lensing(n) for n in moved],
            "ia": [alignment(n) for n in nominal], "spectrum": spectrum}


def test_photoz_shift_moves_born_power_as_limber_predicts(born_spectra, limber_kernels):
    # Moving a bin's n(z) by dz changes its lensing kernel; the Limber integral (Limber 1953;
    # Kaiser 1992) with the moved n(z) predicts the change. Measured as the ratio of moved to
    # nominal power over the same realisations (cosmic variance largely cancels).
    spec = limber_kernels["spectrum"]
    for i in range(2):
        measured = born_spectra[f"GG{i + 2}"].mean(axis=0) / born_spectra[f"GG{i}"].mean(axis=0)
        per_real = born_spectra[f"GG{i + 2}"] / born_spectra[f"GG{i}"]
        err = per_real.std(axis=0, ddof=1) / np.sqrt(N_REAL)
        q, qm = limber_kernels["q"][i], limber_kernels["q_moved"][i]
        predicted = spec(qm, qm) / spec(q, q)
        print(f"bin {i} moved by {DZ if i == 0 else -DZ:+g}: power ratio measured {np.round(measured, 4)} "
              f"+- {np.round(err, 4)}, Limber {np.round(predicted, 4)}, agreement {np.round(measured / predicted, 4)}")
        assert np.all(np.abs(predicted - 1) > 0.15)  # the shift is a real change of the power
        assert np.all(np.abs(measured / predicted - 1) < 0.05), (measured, predicted)


def test_alignment_ii_and_gi_power_match_the_nla_limber_prediction(born_spectra, limber_kernels):
    # Nonlinear alignment model (Hirata & Seljak 2004; Bridle & King 2007), Limber integrals:
    # C_II(ij) = int n_i n_j F^2 P / chi^2, C_GI(ij) = -int (q_i n_j + n_i q_j) F P / chi^2,
    # at A_IA = 1 (the observed power is C_GG + A C_GI + A^2 C_II). Within 10%, or 2 standard
    # errors of the realisation mean where that is larger (as the other Limber checks).
    spec = limber_kernels["spectrum"]
    q, ia = limber_kernels["q"], limber_kernels["ia"]
    for i, j in ((0, 0), (0, 1), (1, 1)):
        theory = {"II": spec(ia[i], ia[j]), "GI": spec(q[i], ia[j]) + spec(ia[i], q[j])}
        assert np.all(theory["GI"] < 0) and np.all(born_spectra[f"GI{i}{j}"].mean(axis=0) < 0)
        for term in ("II", "GI"):
            values = born_spectra[f"{term}{i}{j}"]
            ratio = values.mean(axis=0) / theory[term]
            err = values.std(axis=0, ddof=1) / np.sqrt(N_REAL) / np.abs(theory[term])
            print(f"{term} bins {i}{j}: measured / NLA Limber = {np.round(ratio, 3)} +- {np.round(err, 3)}")
            assert np.all(np.abs(ratio - 1) < np.maximum(0.10, 2 * err)), (term, i, j, ratio, err)


def test_multiplane_alignment_power_matches_born(suite, nz_setup):
    # The multi-plane tracer reads the tides on the deflected rays; pixel by pixel the maps
    # differ, the spectra agree to the post-Born level (per cent below ell ~ 2000, common
    # practice; Hilbert et al. 2009), as for the lensing maps.
    z, nominal, _, f_ia = nz_setup
    sbs = [SourceBin.from_nz(z, n) for n in nominal]
    abins = [AlignmentBin(z, n * f_ia) for n in nominal]
    edges = np.geomspace(250, 2000, 5)
    pix = np.deg2rad(FIELD_DEG) / PIXELS
    out = {"born": [], "multi-plane": []}
    for r in range(4):
        for method in out:
            m = suite.trace(r, method=method, bins=sbs, alignment_bins=abins, field_deg=FIELD_DEG, pixels=PIXELS,
                            z_max=1.0)
            out[method].append([binned_cross_spectrum(m["ia_kappa"][i], None, pix, edges)[1] for i in range(2)]
                               + [binned_cross_spectrum(m["kappa"][i], m["ia_kappa"][i], pix, edges)[1]
                                  for i in range(2)])
    ratio = np.mean(out["multi-plane"], axis=0) / np.mean(out["born"], axis=0)
    print(f"multi-plane / Born: II {np.round(ratio[:2], 4)}, GI {np.round(ratio[2:], 4)}")
    assert np.all(np.abs(ratio - 1) < 0.03), ratio
