# The plan and everything the rules share: settings slices, result paths, input functions.
# Rule files hold rules only; each reads the plan through the get_* functions below.
import sys
from dataclasses import asdict

from snakemake.exceptions import WorkflowError

from plateloom.assets import demo_scenario
from plateloom.errors import InputError
from plateloom.setup.image_inputs import ImageInputs
from plateloom.setup.plan import (
    DEMO_IMAGE_ROOT,
    plan_screen,
    resolve_features,
    resolve_image_scale,
)
from plateloom.plate.exclusions import ExclusionRules
from plateloom.plate.stage import PlateSettings
from plateloom.screen.kinetics import KineticSettings
from plateloom.screen.model_wells import feature_chunks
from plateloom.well.collective import CollectiveSettings
from plateloom.well.illumination import IlluminationSettings
from plateloom.well.stage import WellSettings

CHANNELS = [c["name"] for c in config["channels"]]
try:
    PLAN = plan_screen(config)
    config["images"].update(resolve_image_scale(config, PLAN))
    IMAGE_INPUTS = ImageInputs(
        config["images"]["filename_template"],
        CHANNELS,
        IlluminationSettings.from_config(config).max_sites,
        PLAN.demo_plates,
    )
    for entry in PLAN.plates.values():
        IMAGE_INPUTS.index(entry)
except InputError as error:
    raise WorkflowError(f"plateloom could not start: {error}")

# The check before launch, on file names only (plateloom check also reads every image header);
# once per run: not again in each job that a cluster executor starts.
if config["check_images_on_start"] and workflow.is_main_process:
    from plateloom.setup.check import check_screen

    CHECK = check_screen(config, read_headers=False)
    for problem in CHECK.problems:
        if problem.severity == "warning":
            print(f"plateloom warning: {problem.message}", file=sys.stderr)
    if CHECK.errors:
        raise WorkflowError(
            "plateloom could not start:\n"
            + "\n".join(f"  - {p.message}" for p in CHECK.errors)
        )

RESULTS = config["results_dir"]
DEMO = config["demo"]
DEMO_SCENARIO = DEMO.get("scenario") or str(demo_scenario())

# Settings slices: each rule gets only the config it uses, so that changing a screen-level
# setting never reruns per-well jobs.
WELL_SETTINGS = asdict(WellSettings.from_config(config))
COLLECTIVE = asdict(CollectiveSettings.from_config(config))
ILLUMINATION = IlluminationSettings.from_config(config)
KINETICS = KineticSettings.from_config(config)
PLATE_SETTINGS = {
    "plate": asdict(PlateSettings.from_config(config)),
    "exclusion_rules": asdict(ExclusionRules.from_config(config)),
    "kinetics": {
        "enabled": KINETICS.enabled,
        "window_min": KINETICS.window_min,
        "max_control_drift": KINETICS.max_control_drift,
    },
}
SCREEN = config["screen"]
FEATURE_CHUNKS = feature_chunks(PLAN.features, int(SCREEN["features_per_job"]))
SCREEN_SETTINGS = {
    "features": PLAN.features,
    "log_features": PLAN.log_features,
    "batch_correction": SCREEN["batch_correction"],
    "fitter": SCREEN["fitter"],
    "df_method": SCREEN["df_method"],
    "ci_level": SCREEN["ci_level"],
    "hit_q_value": SCREEN["hit_q_value"],
    "hit_min_log_ratio": SCREEN["hit_min_log_ratio"],
    "hit_min_standardized_effect": SCREEN["hit_min_standardized_effect"],
    "model_on_corrected_values": SCREEN["model_on_corrected_values"],
    "dose_response_features": resolve_features(
        SCREEN["dose_response"]["features"], config
    ),
    "dose_response_min_doses": SCREEN["dose_response"]["min_doses"],
    "design_check": SCREEN["design_check"],
}
KINETIC_SETTINGS = {
    key: SCREEN_SETTINGS[key]
    for key in (
        "features",
        "ci_level",
        "fitter",
        "df_method",
        "hit_q_value",
        "hit_min_log_ratio",
        "hit_min_standardized_effect",
    )
} | {
    "kinetic_features": PLAN.kinetic_features,
    "window_min": KINETICS.window_min,
    "onset_windows": KINETICS.onset_windows,
}
SCREEN_JOB = PLAN.screen_job_size()

# only_plates: a quick look at some plates (their per-well and plate jobs and reports), no screen model.
LOOK_AT = config["only_plates"]
UNKNOWN = sorted(set(LOOK_AT) - set(PLAN.plates))
if UNKNOWN:
    raise WorkflowError(
        f"plateloom could not start: config only_plates lists {UNKNOWN}, which are not in "
        f"{config['screen_sheet']}; use plate ids from its plate column."
    )

# Result paths shared by several rules.
MODEL_WELLS = f"{RESULTS}/screen/model_wells.parquet"
TREATMENTS = f"{RESULTS}/screen/treatments.parquet"
EFFECTS = f"{RESULTS}/effects.parquet"
PLATE_TABLES = {
    "wells": f"{RESULTS}/wells/plate={{plate}}/part-0.parquet",
    "qc": f"{RESULTS}/plate_qc/plate={{plate}}/part-0.parquet",
    "ledger": f"{RESULTS}/exclusions/plate={{plate}}/part-0.parquet",
    "edge": f"{RESULTS}/edge_effects/plate={{plate}}/part-0.parquet",
    "notes": f"{RESULTS}/plate_notes/{{plate}}.json",
}
if KINETICS.enabled:
    PLATE_TABLES["time_courses"] = (
        f"{RESULTS}/time_courses/plate={{plate}}/part-0.parquet"
    )
ALL_TIME_COURSES = (
    expand(PLATE_TABLES["time_courses"], plate=sorted(PLAN.plates))
    if KINETICS.enabled
    else []
)
KINETIC_SUMMARY = f"{RESULTS}/kinetic_summary.parquet"
ALL_THUMBNAIL_FOLDERS = [
    f"{RESULTS}/thumbnails/plate={plate}/chunk-{chunk}"
    for plate in sorted(PLAN.plates)
    for chunk in PLAN.chunk_ids(plate)
]
ALL_TRACK_FOLDERS = [
    f"{RESULTS}/tracks/plate={plate}/chunk-{chunk}"
    for plate in sorted(PLAN.plates)
    for chunk in PLAN.chunk_ids(plate)
]
FATE_TABLES = {
    "effects": f"{RESULTS}/fate_effects.parquet",
    "survival": f"{RESULTS}/survival.parquet",
    "growth": f"{RESULTS}/growth_inhibition.parquet",
    "gr_curves": f"{RESULTS}/gr_curves.parquet",
}
EFFECTS_OVER_TIME = f"{RESULTS}/effects_over_time.parquet"
ALL_WELL_TABLES = expand(PLATE_TABLES["wells"], plate=sorted(PLAN.plates))
ALL_LEDGERS = expand(PLATE_TABLES["ledger"], plate=sorted(PLAN.plates))
EFFECT_PARTS = expand(
    f"{RESULTS}/screen/effects_parts/chunk={{chunk}}.parquet",
    chunk=[f"{i:03d}" for i in range(len(FEATURE_CHUNKS))],
)


def get_final_targets():
    """The screen report (unless only_plates is set) and every plate report."""
    plates = sorted(LOOK_AT or PLAN.plates)
    screen = [] if LOOK_AT else [f"{RESULTS}/reports/screen.html"]
    return screen + expand(f"{RESULTS}/reports/plates/{{plate}}.html", plate=plates)


def get_layout(wildcards):
    return PLAN.plates[wildcards.plate].layout


def get_image_folder(wildcards):
    return PLAN.plates[wildcards.plate].image_folder


def get_chunk_images(wildcards):
    """The image files of one chunk's wells (a generated demo plate: its folder)."""
    return IMAGE_INPUTS.chunk_files(
        PLAN.plates[wildcards.plate], get_chunk_wells(wildcards)
    )


def get_illumination_images(wildcards):
    """The files of one channel at the sites its flat field samples (a demo plate: its folder)."""
    return IMAGE_INPUTS.illumination_files(
        PLAN.plates[wildcards.plate], wildcards.channel
    )


def get_treatment_time(wildcards):
    """Minutes from the plate's first frame to its treatment (None: not given)."""
    return PLAN.plates[wildcards.plate].treatment_time_min


def get_batch(wildcards):
    return PLAN.plates[wildcards.plate].batch


def get_plate_format(wildcards):
    return PLAN.plates[wildcards.plate].plate_format


def get_flat_fields(wildcards):
    """The plate's illumination profiles, one per channel in config order (none if switched off)."""
    if ILLUMINATION.method == "none":
        return []
    return [
        f"{RESULTS}/illumination/plate={wildcards.plate}/{channel}.tif"
        for channel in CHANNELS
    ]


def get_chunk_folders(kind):
    """An input function: the per-chunk folders of one table (cells, tracks, ...) of a plate."""

    def folders(wildcards):
        chunks = PLAN.chunk_ids(wildcards.plate)
        return [
            f"{RESULTS}/{kind}/plate={wildcards.plate}/chunk-{chunk}"
            for chunk in chunks
        ]

    return folders


def get_chunk_wells(wildcards):
    return PLAN.chunks[wildcards.plate][int(wildcards.chunk)]


def get_well_job_mem_mb(wildcards):
    return PLAN.well_job_size(wildcards.plate, wildcards.chunk).mem_mb


def get_well_job_runtime(wildcards):
    return PLAN.well_job_size(wildcards.plate, wildcards.chunk).runtime_min


def get_illumination_mem_mb(wildcards):
    planes = ILLUMINATION.max_sites * ILLUMINATION.frames_per_site
    return PLAN.illumination_job_size(wildcards.plate, planes).mem_mb


def get_feature_chunk(wildcards):
    return FEATURE_CHUNKS[int(wildcards.chunk)]


def get_filename_template(wildcards):
    # a function, not the string: Snakemake would fill a string's {well} and {site} as wildcards
    return config["images"]["filename_template"]
