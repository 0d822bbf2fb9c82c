# raytrace: N-body snapshots -> lens planes -> ray-traced maps -> statistics -> forecasts.
# Rules are thin: each names its files, params, resources and log, and calls one
# `raytrace` subcommand with the configuration section it depends on.
import json
import shlex
import sys

from snakemake.utils import min_version, validate

min_version("8.0")


# the default demo suite, unless a configuration is given on the command line
# (--configfile would otherwise be merged key by key into the default one)
if not config:

    configfile: "config/config.yaml"



import raytrace.config as rtconfig
import raytrace.systematics as rtsystematics
from raytrace.errors import RaytraceError

try:
    # our validator first: one line naming the key; it also fills the defaults
    # (snakemake's would add demo-only defaults to a files suite)
    rtconfig.validate(config)
except RaytraceError as exc:
    sys.exit(f"raytrace: configuration error: {exc}")
validate(config, "config/schema.yaml", set_default=False)
config = rtconfig.validate(config)


include: "workflow/rules/common.smk"
include: "workflow/rules/simulate.smk"
if config["maps"]["geometry"] == "sphere":  # full-sky HEALPix shells instead of lens planes

    include: "workflow/rules/sky.smk"

else:

    include: "workflow/rules/slice.smk"
    include: "workflow/rules/trace.smk"


include: "workflow/rules/observe.smk"
include: "workflow/rules/measure.smk"
include: "workflow/rules/systematics.smk"
include: "workflow/rules/stack.smk"
include: "workflow/rules/forecast.smk"
include: "workflow/rules/report.smk"


report: "workflow/report/workflow.rst"


rule all:
    input:
        [f"{OUT}/stacks/{m}.h5" for m in MODELS],
        report_files(),
        forecast_outputs() if FORECAST else [],
        variant_stack_files(),
    default_target: True
