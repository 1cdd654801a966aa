# plateloom: multi-plate live-cell imaging screens, from images to condition effects.
# Shape: demo images (optional) -> per-well chunks -> per-plate fan-in -> per-screen fan-in.
from snakemake.exceptions import WorkflowError
from snakemake.utils import min_version, validate

min_version("8.0")

configfile: "config/config.yaml"

validate(config, "workflow/schemas/config.schema.yaml")

from plateloom.errors import InputError
from plateloom.plan import plan_screen

try:
    PLAN = plan_screen(config)
except InputError as error:
    raise WorkflowError(f"plateloom could not start: {error}")

RESULTS = config["results_dir"]

include: "workflow/rules/demo.smk"
include: "workflow/rules/wells.smk"
include: "workflow/rules/plates.smk"
include: "workflow/rules/screen.smk"


rule all:
    input:
        f"{RESULTS}/reports/screen.html",
        expand(f"{RESULTS}/reports/plates/{{plate}}.html", plate=sorted(PLAN.plates)),
    default_target: True
