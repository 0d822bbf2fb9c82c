# Derivatives between models, the fiducial covariance, Fisher forecasts per combination.

FORECAST = config.get("forecast")


def forecast_models():
    steps = rtconfig.forecast_steps(config)
    stepped = [m for s in steps.values() for m, _ in s.values()]
    return [FIDUCIAL] + [m for m in MODELS if m in stepped and m != FIDUCIAL]


def forecast_maps():
    """Map labels of the data vector: forecast.maps, else the tomographic bins, else every source."""
    bins = [x for x in MAP_LABELS if x.startswith("bin")]
    return FORECAST.get("maps") or bins or MAP_LABELS


def forecast_settings():
    return as_json(
        {
            "forecast": FORECAST,
            "steps": rtconfig.forecast_steps(config),
            "fiducial_values": rtconfig.model_parameters(config, FIDUCIAL),
            "maps": forecast_maps(),
            "map_area_deg2": rtconfig.map_area_deg2(config),
            # nuisance parameters: their steps are the fiducial's observe variants
            "nuisance": {
                name: {
                    "fiducial": p["fiducial"],
                    "prior_sigma": p["prior_sigma"],
                    "minus": [f"{FIDUCIAL}@{p['minus'][0]}", p["minus"][1]],
                    "plus": [f"{FIDUCIAL}@{p['plus'][0]}", p["plus"][1]],
                }
                for name, p in NUISANCE.items()
            },
        }
    )


def nuisance_stacks():
    return [f"{OUT}/variants/{v}/stacks/{FIDUCIAL}.h5" for p in NUISANCE.values() for v, _ in (p["minus"], p["plus"])]


def forecast_outputs():
    names = ["forecast.h5", "errors.csv", "errors.html", "diagnostics.csv", "ellipses.png"]
    return [f"{OUT}/forecast/{name}" for name in names + (["degradation.csv"] if NUISANCE else [])]


if FORECAST:

    rule forecast:
        input:
            stacks=[f"{OUT}/stacks/{m}.h5" for m in forecast_models()] + nuisance_stacks(),
            prior=[p for p in [(FORECAST.get("priors") or {}).get("fisher")] if p],
        output:
            h5=f"{OUT}/forecast/forecast.h5",
            table=report(f"{OUT}/forecast/errors.csv", caption="../report/errors_csv.rst", category="3. Forecast"),
            html=report(f"{OUT}/forecast/errors.html", caption="../report/errors.rst", category="3. Forecast"),
            diagnostics=report(f"{OUT}/forecast/diagnostics.csv", caption="../report/diagnostics.rst", category="3. Forecast"),
            ellipses=report(f"{OUT}/forecast/ellipses.png", caption="../report/ellipses.rst", category="3. Forecast"),
            **({"degradation": report(f"{OUT}/forecast/degradation.csv", caption="../report/degradation.rst",
                                      category="3. Forecast")} if NUISANCE else {}),
        params:
            settings=forecast_settings(),
            degradation=lambda w, output: f" --degradation {quoted([output.degradation])}" if NUISANCE else "",
        log:
            "logs/forecast/forecast.log",
        benchmark:
            "logs/benchmarks/forecast/forecast.tsv"
        group:
            "summary"
        threads: job_threads("forecast")
        resources:
            **job_resources("forecast"),
        shell:
            "{RAYTRACE} forecast --settings {params.settings:q} --stacks {input.stacks:q} --output {output.h5:q} "
            "--table {output.table:q} --html {output.html:q} --diagnostics {output.diagnostics:q} "
            "--ellipses {output.ellipses:q}{params.degradation} 2> {log:q}"
