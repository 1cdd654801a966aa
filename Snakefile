# plateloom: multi-plate live-cell imaging screens, from images to condition effects.
# Shape: demo images (optional) -> per-well chunks -> per-plate fan-in -> per-screen fan-in.
import sys

from snakemake.exceptions import WorkflowError
from snakemake.utils import min_version, validate

min_version("8.0")

configfile: "config/config.yaml"

validate(config, "workflow/schemas/config.schema.yaml")

from plateloom.errors import InputError
from plateloom.plan import plan_screen, resolve_image_scale

try:
    PLAN = plan_screen(config)
    config["images"].update(resolve_image_scale(config, PLAN))
except InputError as error:
    raise WorkflowError(f"plateloom could not start: {error}")

# The check before launch, on file names only (plateloom check also reads every image header);
# once per run: not again in each job that a cluster executor starts.
if config.get("check_images_on_start", True) and workflow.is_main_process:
    from plateloom.preflight import check_screen

    CHECK = check_screen(config, read_headers=False)
    for problem in CHECK.problems:
        if problem.severity == "warning":
            print(f"plateloom warning: {problem.message}", file=sys.stderr)
    if CHECK.errors:
        raise WorkflowError("plateloom could not start:\n" + "\n".join(f"  - {p.message}" for p in CHECK.errors))

RESULTS = config["results_dir"]

report: "workflow/report/workflow.rst"

include: "workflow/rules/demo.smk"
include: "workflow/rules/wells.smk"
include: "workflow/rules/plates.smk"
include: "workflow/rules/screen.smk"


# only_plates: a quick look at some plates (their per-well and plate jobs and reports), no screen model.
LOOK_AT = config.get("only_plates") or []
UNKNOWN = sorted(set(LOOK_AT) - set(PLAN.plates))
if UNKNOWN:
    raise WorkflowError(f"plateloom could not start: config only_plates lists {UNKNOWN}, which are not in "
                        f"{config['screen_sheet']}; use plate ids from its plate column.")


rule all:
    input:
        [] if LOOK_AT else f"{RESULTS}/reports/screen.html",
        expand(f"{RESULTS}/reports/plates/{{plate}}.html", plate=sorted(LOOK_AT or PLAN.plates)),
    default_target: True
