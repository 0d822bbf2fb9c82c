"""Systematics in the workflow: one-line errors, nuisance variants, and what reruns."""

from __future__ import annotations

import copy
import json

import h5py
import numpy as np
import pytest
import yaml

from raytrace import config as rc
from raytrace.errors import RaytraceError

from test_errors import SMALL, assert_nothing_written, one_error_line, run
from workflow_helpers import planned_jobs, snakemake, tiny_config


def with_systematics(systematics, sources=True):
    cfg = copy.deepcopy(SMALL)
    cfg["survey"]["systematics"] = systematics
    if not sources:
        del cfg["survey"]["sources"]
    return cfg


@pytest.mark.parametrize(
    "systematics, sources, expected",
    [
        ({"shear_bias": {"m": [0.01, 0.02, 0.0]}}, True, "survey.systematics.shear_bias.m: 3 values for 2 tomographic bin"),
        ({"shear_bias": {"c2": [0.01]}}, True, "survey.systematics.shear_bias.c2: 1 values for 2 tomographic bin"),
        ({"shear_bias": {"m": -1.5}}, True, "survey.systematics.shear_bias.m: must exceed -1"),
        ({"photoz": {"shift": [0.0, 0.1, 0.2]}}, True, "survey.systematics.photoz.shift: 3 values for 2"),
        ({"photoz": {"stretch": [1.0, 0.0]}}, True, "survey.systematics.photoz.stretch: must be positive"),
        ({"photoz": {"offset": [0.02, 0.0]}}, True, "survey.systematics.photoz.offset: 0.02 for bin 0 was not traced"),
        ({"photoz": {"derivative_step": 0.02, "offset": [0.03, 0.0]}}, True, "survey.systematics.photoz.offset: 0.03"),
        ({"photoz": {"derivative_step": -0.02}}, True, "survey.systematics.photoz.derivative_step"),
        ({"intrinsic_alignment": {"amplitude": "big"}}, True, "survey.systematics.intrinsic_alignment.amplitude"),
        ({"intrinsic_alignment": {"A": 1.0}}, True, "survey.systematics.intrinsic_alignment.A: unknown key"),
        ({"shear_bias": {"m": 0.01}}, False, "survey.systematics: systematics act on tomographic bins"),
        ({"variants": {"up": {"shear_bias": {"m": [0.1]}}}}, True, "survey.systematics.variants.up.shear_bias.m: 1 values"),
        ({"variants": {"up": {"photoz": {"shift": 0.1}}}}, True, "survey.systematics.variants.up.photoz.shift: unknown key"),
        ({"variant_models": ["nope"]}, True, "survey.systematics.variant_models: 'nope' is not one of suite.models"),
    ],
)
def test_bad_systematics_config_gives_one_line_naming_the_key(tmp_path, systematics, sources, expected):
    path = tmp_path / "bad.yaml"
    path.write_text(yaml.safe_dump(with_systematics(systematics, sources)))
    with pytest.raises(RaytraceError, match=expected.replace(".", r"\.").replace("(", r"\(")):
        rc.load(path)
    assert expected in one_error_line(run("validate", str(path)))


@pytest.fixture(scope="module")
def traced_without_alignment(suite, tmp_path_factory):
    out = tmp_path_factory.mktemp("observe_errors") / "maps.h5"
    settings = {"cosmology": SMALL["suite"]["fiducial"], "seed": 1,
                "sources": {"nz": {"kind": "smail", "z0": 0.45}, "z_max": 1.0, "z_points": 101, "bins": {"n_bins": 2}},
                "maps": {"field_deg": 1.0, "pixels": 32, "method": "born", "source_redshifts": [1.0],
                         "randomize_planes": True}}
    proc = run("trace", "--model", "m", "--realization", "0", "--settings", json.dumps(settings),
               "--planes", *map(str, suite.plane_files), "--output", str(out))
    assert proc.returncode == 0, proc.stderr
    return out


def test_convergence_from_shear_serves_every_map(traced_without_alignment, tmp_path):
    # the Kaiser-Squires option is a way of making maps, not a bin systematic: every observed
    # convergence, source planes included, is the inversion of the observed shear (the inversion
    # itself is checked against Kaiser & Squires 1993 on a periodic field in test_systematics)
    from raytrace.observe import observe
    from raytrace.systematics import kaiser_squires

    out = tmp_path / "observed.h5"
    observe(traced_without_alignment, out, {"noise": {"enabled": False}, "systematics": {"convergence_from_shear": True}},
            seed=1, realization=0)
    with h5py.File(out) as f, h5py.File(traced_without_alignment) as t:
        shear = [(t["gamma1"][0], t["gamma2"][0])] + [(t["bins/gamma1"][b], t["bins/gamma2"][b]) for b in range(2)]
        for i, (g1, g2) in enumerate(shear):
            expected = kaiser_squires(g1.astype(float), g2.astype(float))
            np.testing.assert_allclose(f["kappa"][i], expected, rtol=1e-5, atol=1e-6 * np.abs(expected).max())
        assert not np.allclose(f["kappa"][0], t["kappa"][0] - t["kappa"][0].mean(), rtol=0.05)  # edge effects


@pytest.mark.parametrize("systematics, expected", [
    ({"intrinsic_alignment": {"amplitude": 1.0}}, "survey.systematics.intrinsic_alignment.amplitude: {maps} holds no alignment maps"),
    ({"photoz": {"offset": [0.0, 0.02]}}, "{maps}: no bins traced for survey.systematics.photoz.offset = 0.02"),
    ({"shear_bias": {"m": [0.0, 0.1, 0.2]}}, "survey.systematics.shear_bias.m: 3 values for 2 tomographic bin"),
])
def test_observe_stage_rejects_nuisance_values_the_maps_cannot_serve(traced_without_alignment, tmp_path, systematics,
                                                                   expected):
    out = tmp_path / "observed.h5"
    settings = json.dumps({"survey": {"systematics": systematics}, "seed": 1})
    line = one_error_line(run("observe", "--realization", "0", "--settings", settings, "--maps",
                              str(traced_without_alignment), "--output", str(out)))
    assert expected.format(maps=traced_without_alignment) in line
    assert_nothing_written(out)


# ------------------------------------------------------------------------------------
SYSTEMATICS = {
    "shear_bias": {"m": [0.0, 0.0]},
    "photoz": {"derivative_step": 0.02},
    "intrinsic_alignment": {"amplitude": 0.0},
    "variants": {"m0_up": {"shear_bias": {"m": [0.02, 0.0]}},
                 "dz1_down": {"photoz": {"offset": [0.0, -0.02]}, "intrinsic_alignment": {"amplitude": 0.5}}},
}


def systematics_config() -> dict:
    cfg = tiny_config()
    cfg["suite"]["models"] = {"fiducial": {}}
    cfg["statistics"] = {"power_spectrum": {"ell_min": 200, "ell_max": 8000, "bins": 8}}
    cfg["survey"]["catalog"] = {"enabled": False}
    cfg["survey"]["fits"] = {"enabled": False}
    cfg["survey"]["systematics"] = copy.deepcopy(SYSTEMATICS)
    del cfg["forecast"]  # one model: nothing to differentiate
    return cfg


@pytest.fixture(scope="module")
def variant_run(tmp_path_factory):
    work = tmp_path_factory.mktemp("systematics_workflow")
    cfg = systematics_config()
    proc = snakemake(work, cfg)
    assert proc.returncode == 0, proc.stderr[-3000:]
    return work, cfg


def test_variants_observe_the_same_traced_maps(variant_run):
    work, cfg = variant_run
    base = work / "results/observed/fiducial/r0000.h5"
    with h5py.File(work / "results/maps/fiducial/r0000.h5") as f:
        assert set(f["bins/photoz_variants"]) == {"shift_plus", "shift_minus"}
        assert f["bins/intrinsic_alignment/kappa"].shape == (2, 64, 64)
    with h5py.File(base) as b:
        for variant, changed in (("m0_up", [2]), ("dz1_down", [2, 3])):
            path = work / f"results/variants/{variant}/observed/fiducial/r0000.h5"
            with h5py.File(path) as v:
                nuisance = json.loads(v.attrs["nuisance"])
                for i in range(4):  # two source planes, two bins
                    same = np.array_equal(v["kappa"][i], b["kappa"][i])
                    assert same == (i not in changed), (variant, i)
                np.testing.assert_array_equal(v["mask"][...], b["mask"][...])  # paired: same mask and noise
            assert (work / f"results/variants/{variant}/statistics/fiducial/r0000.h5").exists()
        assert json.loads(b.attrs["nuisance"])["m"] == [0.0, 0.0]
    assert nuisance["offset"] == [0.0, -0.02] and nuisance["amplitude"] == 0.5


def test_second_systematics_run_does_nothing(variant_run):
    work, cfg = variant_run
    assert planned_jobs(snakemake(work, cfg, "-n")) == {}


@pytest.mark.parametrize("change, expected", [
    # a variant's own value: that variant only, never the trace
    # (every change also redraws the provenance page, which shows the whole configuration)
    (lambda s: s["variants"]["m0_up"]["shear_bias"].update(m=[0.03, 0.0]),
     {"observe_variant": 1, "measure_variant": 1, "stack_variant": 1, "provenance": 1}),
    # a new variant: only its observing, measuring and stacking
    (lambda s: s["variants"].update(ia_up={"intrinsic_alignment": {"amplitude": 1.0}}),
     {"observe_variant": 1, "measure_variant": 1, "stack_variant": 1, "provenance": 1}),
    # a nominal nuisance value: observing onward and the variants that inherit it (dz1_down sets
    # its own amplitude), no trace
    (lambda s: s["intrinsic_alignment"].update(amplitude=0.2),
     {"observe": 1, "measure": 1, "stack": 1, "observe_variant": 1, "measure_variant": 1, "stack_variant": 1,
      "plot_maps": 1, "plot_statistics": 1, "provenance": 1}),
    (lambda s: s.update(convergence_from_shear=True),
     {"observe": 1, "measure": 1, "stack": 1, "observe_variant": 2, "measure_variant": 2, "stack_variant": 2,
      "plot_maps": 1, "plot_statistics": 1, "provenance": 1}),
    # what the traced maps depend on: re-trace
    (lambda s: s["intrinsic_alignment"].update(eta=1.0),
     {"trace": 1, "observe": 1, "measure": 1, "stack": 1, "observe_variant": 2, "measure_variant": 2,
      "stack_variant": 2, "plot_maps": 1, "plot_statistics": 1, "provenance": 1}),
])
def test_what_reruns_when_a_systematic_changes(variant_run, change, expected):
    work, cfg = variant_run
    changed = copy.deepcopy(cfg)
    change(changed["survey"]["systematics"])
    jobs = planned_jobs(snakemake(work, changed, "-n"))
    assert jobs == expected | {"all": 1}, jobs
