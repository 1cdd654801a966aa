# Per well (fan-out): one job per chunk of wells of one plate; one Parquet file per well.

from dataclasses import asdict

from plateloom.collective import CollectiveSettings
from plateloom.illumination import IlluminationSettings
from plateloom.wellwork import WellSettings

WELL_SETTINGS = asdict(WellSettings.from_config(config))
COLLECTIVE = asdict(CollectiveSettings.from_config(config))
ILLUMINATION = IlluminationSettings.from_config(config)
CHANNELS = [c["name"] for c in config["channels"]]


def flat_field_files(plate):
    """The plate's illumination profiles, one per channel in config order (none if switched off)."""
    if ILLUMINATION.method == "none":
        return []
    return [f"{RESULTS}/illumination/plate={plate}/{channel}.tif" for channel in CHANNELS]


rule estimate_illumination:
    input:
        images=lambda w: PLAN.plates[w.plate].image_folder,
    output:
        profile=f"{RESULTS}/illumination/plate={{plate}}/{{channel}}.tif",
    params:
        plate_format=lambda w: PLAN.plates[w.plate].plate_format,
        template=lambda w: config["images"]["filename_template"],
        channels=CHANNELS,
        pixel_size_um=config["images"]["pixel_size_um"],
        settings=asdict(ILLUMINATION),
    wildcard_constraints:
        channel="|".join(CHANNELS),
    log:
        f"{RESULTS}/logs/estimate_illumination/{{plate}}_{{channel}}.log",
    benchmark:
        f"{RESULTS}/benchmarks/estimate_illumination/{{plate}}_{{channel}}.tsv"
    threads: 1
    resources:
        mem_mb=lambda w: PLAN.illumination_job_size(w.plate, ILLUMINATION.max_sites * ILLUMINATION.frames_per_site).mem_mb,
        runtime=30,
    script:
        "../../scripts/steps/estimate_illumination.py"


def chunk_folders(kind, plate):
    return [f"{RESULTS}/{kind}/plate={plate}/chunk={chunk}" for chunk in PLAN.chunk_ids(plate)]


rule analyse_wells:
    input:
        images=lambda w: PLAN.plates[w.plate].image_folder,
        flat_fields=lambda w: flat_field_files(w.plate),
    output:
        cells=directory(f"{RESULTS}/cells/plate={{plate}}/chunk={{chunk}}"),
        tracks=directory(f"{RESULTS}/tracks/plate={{plate}}/chunk={{chunk}}"),
        site_qc=directory(f"{RESULTS}/site_qc/plate={{plate}}/chunk={{chunk}}"),
        collective=directory(f"{RESULTS}/collective/plate={{plate}}/chunk={{chunk}}"),
    params:
        wells=lambda w: PLAN.chunks[w.plate][int(w.chunk)],
        plate_format=lambda w: PLAN.plates[w.plate].plate_format,
        template=lambda w: config["images"]["filename_template"],
        settings=WELL_SETTINGS,
        collective=COLLECTIVE,
    wildcard_constraints:
        chunk=r"\d{3}",
    log:
        f"{RESULTS}/logs/analyse_wells/{{plate}}_{{chunk}}.log",
    benchmark:
        f"{RESULTS}/benchmarks/analyse_wells/{{plate}}_{{chunk}}.tsv"
    threads: 1
    resources:
        mem_mb=lambda w: PLAN.well_job_size(w.plate, w.chunk).mem_mb,
        runtime=lambda w: PLAN.well_job_size(w.plate, w.chunk).runtime_min,
    script:
        "../../scripts/steps/analyse_wells.py"
