# Per well (fan-out): one job per chunk of wells of one plate; one Parquet file per well.

from dataclasses import asdict

from plateloom.wellwork import WellSettings

WELL_SETTINGS = asdict(WellSettings.from_config(config))


def chunk_folders(kind, plate):
    return [f"{RESULTS}/{kind}/plate={plate}/chunk={chunk}" for chunk in PLAN.chunk_ids(plate)]


rule analyse_wells:
    input:
        images=lambda w: PLAN.plates[w.plate].image_folder,
    output:
        cells=directory(f"{RESULTS}/cells/plate={{plate}}/chunk={{chunk}}"),
        tracks=directory(f"{RESULTS}/tracks/plate={{plate}}/chunk={{chunk}}"),
        site_qc=directory(f"{RESULTS}/site_qc/plate={{plate}}/chunk={{chunk}}"),
    params:
        wells=lambda w: PLAN.chunks[w.plate][int(w.chunk)],
        plate_format=lambda w: PLAN.plates[w.plate].plate_format,
        template=lambda w: config["images"]["filename_template"],
        settings=WELL_SETTINGS,
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
