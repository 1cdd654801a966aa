# Per screen (fan-in over plates): batch correction and its diagnostics, mixed-effects condition
# effects in parallel jobs over feature chunks, BH q-values and hits, dose-response, design check,
# screen report.

from plateloom.plan import resolve_features
from plateloom.screen_stage import feature_chunks

SCREEN = config["screen"]
FEATURE_CHUNKS = feature_chunks(PLAN.features, int(SCREEN["features_per_job"]))
SCREEN_SETTINGS = {
    "features": PLAN.features,
    "log_features": PLAN.log_features,
    "batch_correction": SCREEN["batch_correction"],
    "fitter": SCREEN["fitter"],
    "ci_level": SCREEN["ci_level"],
    "hit_q_value": SCREEN["hit_q_value"],
    "hit_min_log_ratio": SCREEN["hit_min_log_ratio"],
    "dose_response_features": resolve_features(SCREEN["dose_response"]["features"], config),
    "dose_response_min_doses": SCREEN["dose_response"]["min_doses"],
    "design_check": SCREEN["design_check"],
}
ALL_WELL_TABLES = expand(f"{RESULTS}/wells/plate={{plate}}/part-0.parquet", plate=sorted(PLAN.plates))
ALL_LEDGERS = expand(f"{RESULTS}/exclusions/plate={{plate}}/part-0.parquet", plate=sorted(PLAN.plates))
MODEL_WELLS = f"{RESULTS}/screen/model_wells.parquet"
SCREEN_JOB = PLAN.screen_job_size()
EFFECT_PARTS = expand(f"{RESULTS}/screen/effects_parts/chunk={{chunk}}.parquet",
                      chunk=[f"{i:03d}" for i in range(len(FEATURE_CHUNKS))])


rule correct_batches:
    input:
        wells=ALL_WELL_TABLES,
    output:
        model_wells=MODEL_WELLS,
        treatments=f"{RESULTS}/screen/treatments.parquet",
        variance=f"{RESULTS}/screen/batch_variance_shares.parquet",
        components=f"{RESULTS}/screen/batch_principal_components.parquet",
    params:
        settings=SCREEN_SETTINGS,
    log:
        f"{RESULTS}/logs/correct_batches.log",
    benchmark:
        f"{RESULTS}/benchmarks/correct_batches.tsv"
    threads: 1
    resources:
        mem_mb=SCREEN_JOB.mem_mb,
        runtime=SCREEN_JOB.runtime_min,
    script:
        "../../scripts/steps/correct_batches.py"


rule fit_effects:
    input:
        model_wells=MODEL_WELLS,
        treatments=f"{RESULTS}/screen/treatments.parquet",
    output:
        part=f"{RESULTS}/screen/effects_parts/chunk={{chunk}}.parquet",
    params:
        features=lambda w: FEATURE_CHUNKS[int(w.chunk)],
        settings=SCREEN_SETTINGS,
    wildcard_constraints:
        chunk=r"\d{3}",
    log:
        f"{RESULTS}/logs/fit_effects/{{chunk}}.log",
    benchmark:
        f"{RESULTS}/benchmarks/fit_effects/{{chunk}}.tsv"
    threads: 1
    resources:
        mem_mb=SCREEN_JOB.mem_mb,
        runtime=SCREEN_JOB.runtime_min,
    script:
        "../../scripts/steps/fit_effects.py"


rule screen_effects:
    input:
        parts=EFFECT_PARTS,
    output:
        parquet=f"{RESULTS}/effects.parquet",
        csv=report(f"{RESULTS}/effects.csv", caption="../report/effects.rst", category="Screen"),
    params:
        settings=SCREEN_SETTINGS,
    log:
        f"{RESULTS}/logs/screen_effects.log",
    benchmark:
        f"{RESULTS}/benchmarks/screen_effects.tsv"
    threads: 1
    resources:
        mem_mb=SCREEN_JOB.mem_mb,
        runtime=SCREEN_JOB.runtime_min,
    script:
        "../../scripts/steps/screen_effects.py"


rule dose_response:
    input:
        model_wells=MODEL_WELLS,
    output:
        parquet=f"{RESULTS}/dose_response.parquet",
        csv=report(f"{RESULTS}/dose_response.csv", caption="../report/dose_response.rst", category="Screen"),
        points=f"{RESULTS}/screen/dose_response_points.parquet",
    params:
        settings=SCREEN_SETTINGS,
    log:
        f"{RESULTS}/logs/dose_response.log",
    benchmark:
        f"{RESULTS}/benchmarks/dose_response.tsv"
    threads: 1
    resources:
        mem_mb=SCREEN_JOB.mem_mb,
        runtime=SCREEN_JOB.runtime_min,
    script:
        "../../scripts/steps/dose_response.py"


rule design_check:
    input:
        model_wells=MODEL_WELLS,
        effects=f"{RESULTS}/effects.parquet",
    output:
        parquet=f"{RESULTS}/design_check.parquet",
        csv=report(f"{RESULTS}/design_check.csv", caption="../report/design_check.rst", category="Screen"),
    params:
        settings=SCREEN_SETTINGS,
    log:
        f"{RESULTS}/logs/design_check.log",
    benchmark:
        f"{RESULTS}/benchmarks/design_check.tsv"
    threads: 1
    resources:
        mem_mb=SCREEN_JOB.mem_mb,
        runtime=SCREEN_JOB.runtime_min,
    script:
        "../../scripts/steps/design_check.py"


rule screen_report:
    input:
        effects=f"{RESULTS}/effects.parquet",
        wells=ALL_WELL_TABLES,
        ledgers=ALL_LEDGERS,
        dose_response=f"{RESULTS}/dose_response.parquet",
        dose_points=f"{RESULTS}/screen/dose_response_points.parquet",
        variance=f"{RESULTS}/screen/batch_variance_shares.parquet",
        components=f"{RESULTS}/screen/batch_principal_components.parquet",
        design_check=f"{RESULTS}/design_check.parquet",
        model_wells=MODEL_WELLS,
    output:
        report=report(f"{RESULTS}/reports/screen.html", caption="../report/screen_report.rst", category="Screen"),
        volcano=report(f"{RESULTS}/reports/figures/volcano.png", caption="../report/volcano.rst", category="Figures"),
        batch_pca=report(f"{RESULTS}/reports/figures/batch_pca.png", caption="../report/batch_pca.rst",
                         category="Figures"),
    params:
        settings=SCREEN_SETTINGS,
    log:
        f"{RESULTS}/logs/screen_report.log",
    benchmark:
        f"{RESULTS}/benchmarks/screen_report.tsv"
    threads: 1
    resources:
        mem_mb=SCREEN_JOB.mem_mb,
        runtime=SCREEN_JOB.runtime_min,
    script:
        "../../scripts/steps/screen_report.py"
