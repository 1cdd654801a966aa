# Per screen (fan-in over plates): mixed-effects condition effects, BH q-values, screen report.

SCREEN_SETTINGS = {
    "features": PLAN.features,
    "log_features": PLAN.log_features,
    "ci_level": config["screen"]["ci_level"],
    "hit_q_value": config["screen"]["hit_q_value"],
    "hit_min_log_ratio": config["screen"]["hit_min_log_ratio"],
}
ALL_WELL_TABLES = expand(f"{RESULTS}/wells/plate={{plate}}/part-0.parquet", plate=sorted(PLAN.plates))
ALL_LEDGERS = expand(f"{RESULTS}/exclusions/plate={{plate}}/part-0.parquet", plate=sorted(PLAN.plates))


rule screen_effects:
    input:
        wells=ALL_WELL_TABLES,
    output:
        parquet=f"{RESULTS}/effects.parquet",
        csv=f"{RESULTS}/effects.csv",
    params:
        settings=SCREEN_SETTINGS,
    log:
        f"{RESULTS}/logs/screen_effects.log",
    benchmark:
        f"{RESULTS}/benchmarks/screen_effects.tsv"
    threads: 1
    resources:
        mem_mb=4000,
        runtime=60,
    script:
        "../../scripts/steps/screen_effects.py"


rule screen_report:
    input:
        effects=f"{RESULTS}/effects.parquet",
        wells=ALL_WELL_TABLES,
        ledgers=ALL_LEDGERS,
    output:
        report=f"{RESULTS}/reports/screen.html",
    params:
        settings=SCREEN_SETTINGS,
    log:
        f"{RESULTS}/logs/screen_report.log",
    benchmark:
        f"{RESULTS}/benchmarks/screen_report.tsv"
    threads: 1
    resources:
        mem_mb=2000,
        runtime=10,
    script:
        "../../scripts/steps/screen_report.py"
