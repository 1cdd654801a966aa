# Per plate (fan-in over wells): well profiles, exclusions, robust z, Z', plate report.

PLATE_SETTINGS = {
    "plate": {k: v for k, v in config["plate"].items() if k != "report_feature"},
    "exclusion_rules": config["exclusion_rules"],
}


rule plate_profiles:
    input:
        cells=lambda w: chunk_folders("cells", w.plate),
        tracks=lambda w: chunk_folders("tracks", w.plate),
        site_qc=lambda w: chunk_folders("site_qc", w.plate),
        collective=lambda w: chunk_folders("collective", w.plate),
        layout=lambda w: PLAN.plates[w.plate].layout,
    output:
        wells=f"{RESULTS}/wells/plate={{plate}}/part-0.parquet",
        qc=f"{RESULTS}/plate_qc/plate={{plate}}/part-0.parquet",
        ledger=f"{RESULTS}/exclusions/plate={{plate}}/part-0.parquet",
        edge=f"{RESULTS}/edge_effects/plate={{plate}}/part-0.parquet",
        notes=f"{RESULTS}/plate_notes/{{plate}}.json",
    params:
        batch=lambda w: PLAN.plates[w.plate].batch,
        plate_format=lambda w: PLAN.plates[w.plate].plate_format,
        image_folder=lambda w: PLAN.plates[w.plate].image_folder,
        template=lambda w: config["images"]["filename_template"],
        channels=[c["name"] for c in config["channels"]],
        settings=PLATE_SETTINGS,
    log:
        f"{RESULTS}/logs/plate_profiles/{{plate}}.log",
    benchmark:
        f"{RESULTS}/benchmarks/plate_profiles/{{plate}}.tsv"
    threads: 2
    resources:
        mem_mb=2000,
        runtime=30,
    script:
        "../../scripts/steps/plate_profiles.py"


rule plate_report:
    input:
        wells=f"{RESULTS}/wells/plate={{plate}}/part-0.parquet",
        qc=f"{RESULTS}/plate_qc/plate={{plate}}/part-0.parquet",
        ledger=f"{RESULTS}/exclusions/plate={{plate}}/part-0.parquet",
        edge=f"{RESULTS}/edge_effects/plate={{plate}}/part-0.parquet",
        notes=f"{RESULTS}/plate_notes/{{plate}}.json",
        flat_fields=lambda w: flat_field_files(w.plate),
    output:
        report=report(f"{RESULTS}/reports/plates/{{plate}}.html", caption="../report/plate_report.rst",
                      category="Plates", subcategory="{plate}"),
    params:
        batch=lambda w: PLAN.plates[w.plate].batch,
        plate_format=lambda w: PLAN.plates[w.plate].plate_format,
        report_feature=config["plate"]["report_feature"],
        channels=CHANNELS,
    log:
        f"{RESULTS}/logs/plate_report/{{plate}}.log",
    benchmark:
        f"{RESULTS}/benchmarks/plate_report/{{plate}}.tsv"
    threads: 1
    resources:
        mem_mb=1000,
        runtime=10,
    script:
        "../../scripts/steps/plate_report.py"
