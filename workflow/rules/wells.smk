# Per well (fan-out): one job per chunk of wells of one plate; one Parquet file per well.


rule estimate_illumination:
    input:
        images=get_illumination_images,
    output:
        profile=f"{RESULTS}/illumination/plate={{plate}}/{{channel}}.tif",
    log:
        f"{RESULTS}/logs/estimate_illumination/{{plate}}_{{channel}}.log",
    benchmark:
        f"{RESULTS}/benchmarks/estimate_illumination/{{plate}}_{{channel}}.tsv"
    wildcard_constraints:
        channel="|".join(CHANNELS),
    conda:
        "../envs/plateloom.yaml"
    threads: 1
    resources:
        mem_mb=get_illumination_mem_mb,
        runtime=30,
    params:
        image_folder=get_image_folder,
        plate_format=get_plate_format,
        template=get_filename_template,
        channels=CHANNELS,
        pixel_size_um=config["images"]["pixel_size_um"],
        settings=asdict(ILLUMINATION),
    script:
        "../scripts/estimate_illumination.py"


rule analyse_wells:
    input:
        images=get_chunk_images,
        flat_fields=get_flat_fields,
    output:
        cells=directory(f"{RESULTS}/cells/plate={{plate}}/chunk-{{chunk}}"),
        tracks=directory(f"{RESULTS}/tracks/plate={{plate}}/chunk-{{chunk}}"),
        site_qc=directory(f"{RESULTS}/site_qc/plate={{plate}}/chunk-{{chunk}}"),
        collective=directory(f"{RESULTS}/collective/plate={{plate}}/chunk-{{chunk}}"),
        thumbnails=directory(f"{RESULTS}/thumbnails/plate={{plate}}/chunk-{{chunk}}"),
        labels=directory(f"{RESULTS}/labels/plate={{plate}}/chunk-{{chunk}}"),
        events=directory(f"{RESULTS}/events/plate={{plate}}/chunk-{{chunk}}"),
    log:
        f"{RESULTS}/logs/analyse_wells/{{plate}}_{{chunk}}.log",
    benchmark:
        f"{RESULTS}/benchmarks/analyse_wells/{{plate}}_{{chunk}}.tsv"
    wildcard_constraints:
        chunk=r"\d{3}",
    conda:
        "../envs/plateloom.yaml"
    threads: 1
    resources:
        mem_mb=get_well_job_mem_mb,
        runtime=get_well_job_runtime,
    params:
        image_folder=get_image_folder,
        wells=get_chunk_wells,
        plate_format=get_plate_format,
        template=get_filename_template,
        settings=WELL_SETTINGS,
        collective=COLLECTIVE,
        export_labels=config["segmentation"]["export_labels"],
    script:
        "../scripts/analyse_wells.py"
