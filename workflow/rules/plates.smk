# Per plate (fan-in over wells): well profiles, exclusions, robust z, Z', plate report.


rule plate_profiles:
    input:
        cells=get_chunk_folders("cells"),
        tracks=get_chunk_folders("tracks"),
        site_qc=get_chunk_folders("site_qc"),
        collective=get_chunk_folders("collective"),
        layout=get_layout,
    output:
        **PLATE_TABLES,
    log:
        f"{RESULTS}/logs/plate_profiles/{{plate}}.log",
    benchmark:
        f"{RESULTS}/benchmarks/plate_profiles/{{plate}}.tsv"
    conda:
        "../envs/plateloom.yaml"
    threads: 2
    resources:
        mem_mb=2000,
        runtime=30,
    params:
        batch=get_batch,
        plate_format=get_plate_format,
        treatment_time_min=get_treatment_time,
        image_folder=get_image_folder,
        template=get_filename_template,
        channels=CHANNELS,
        settings=PLATE_SETTINGS,
    script:
        "../scripts/plate_profiles.py"


rule plate_report:
    input:
        **PLATE_TABLES,
        flat_fields=get_flat_fields,
        thumbnails=get_chunk_folders("thumbnails"),
    output:
        report=report(
            f"{RESULTS}/reports/plates/{{plate}}.html",
            caption="../report/plate_report.rst",
            category="Plates",
            subcategory="{plate}",
        ),
    log:
        f"{RESULTS}/logs/plate_report/{{plate}}.log",
    benchmark:
        f"{RESULTS}/benchmarks/plate_report/{{plate}}.tsv"
    conda:
        "../envs/plateloom.yaml"
    threads: 1
    resources:
        mem_mb=1000,
        runtime=10,
    params:
        batch=get_batch,
        plate_format=get_plate_format,
        report_feature=config["plate"]["report_feature"],
        channels=CHANNELS,
        max_control_drift=KINETICS.max_control_drift,
    script:
        "../scripts/plate_report.py"
