# Per screen (fan-in over plates): batch correction and its diagnostics, mixed-effects condition
# effects in parallel jobs over feature chunks, BH q-values and hits, dose-response, design check,
# screen report.


rule correct_batches:
    input:
        wells=ALL_WELL_TABLES,
    output:
        model_wells=MODEL_WELLS,
        treatments=TREATMENTS,
        variance=f"{RESULTS}/screen/batch_variance_shares.parquet",
        components=f"{RESULTS}/screen/batch_principal_components.parquet",
    log:
        f"{RESULTS}/logs/correct_batches.log",
    benchmark:
        f"{RESULTS}/benchmarks/correct_batches.tsv"
    conda:
        "../envs/plateloom.yaml"
    threads: 1
    resources:
        mem_mb=SCREEN_JOB.mem_mb,
        runtime=SCREEN_JOB.runtime_min,
    params:
        settings=SCREEN_SETTINGS,
    script:
        "../scripts/correct_batches.py"


rule fit_effects:
    input:
        model_wells=MODEL_WELLS,
        treatments=TREATMENTS,
    output:
        part=f"{RESULTS}/screen/effects_parts/chunk={{chunk}}.parquet",
    log:
        f"{RESULTS}/logs/fit_effects/{{chunk}}.log",
    benchmark:
        f"{RESULTS}/benchmarks/fit_effects/{{chunk}}.tsv"
    wildcard_constraints:
        chunk=r"\d{3}",
    conda:
        "../envs/plateloom.yaml"
    threads: 1
    resources:
        mem_mb=SCREEN_JOB.mem_mb,
        runtime=SCREEN_JOB.runtime_min,
    params:
        features=get_feature_chunk,
        settings=SCREEN_SETTINGS,
    script:
        "../scripts/fit_effects.py"


rule screen_effects:
    input:
        parts=EFFECT_PARTS,
    output:
        parquet=EFFECTS,
        csv=report(
            f"{RESULTS}/effects.csv",
            caption="../report/effects.rst",
            category="Screen",
        ),
    log:
        f"{RESULTS}/logs/screen_effects.log",
    benchmark:
        f"{RESULTS}/benchmarks/screen_effects.tsv"
    conda:
        "../envs/plateloom.yaml"
    threads: 1
    resources:
        mem_mb=SCREEN_JOB.mem_mb,
        runtime=SCREEN_JOB.runtime_min,
    params:
        settings=SCREEN_SETTINGS,
    script:
        "../scripts/screen_effects.py"


rule effects_over_time:
    input:
        time_courses=ALL_TIME_COURSES,
        model_wells=MODEL_WELLS,
        treatments=TREATMENTS,
    output:
        effects=EFFECTS_OVER_TIME,
        effects_csv=report(
            f"{RESULTS}/effects_over_time.csv",
            caption="../report/effects_over_time.rst",
            category="Screen",
        ),
        summary=KINETIC_SUMMARY,
        summary_csv=report(
            f"{RESULTS}/kinetic_summary.csv",
            caption="../report/kinetic_summary.rst",
            category="Screen",
        ),
    log:
        f"{RESULTS}/logs/effects_over_time.log",
    benchmark:
        f"{RESULTS}/benchmarks/effects_over_time.tsv"
    conda:
        "../envs/plateloom.yaml"
    threads: 1
    resources:
        mem_mb=SCREEN_JOB.mem_mb,
        runtime=SCREEN_JOB.runtime_min,
    params:
        settings=KINETIC_SETTINGS,
    script:
        "../scripts/effects_over_time.py"


rule dose_response:
    input:
        model_wells=MODEL_WELLS,
    output:
        parquet=f"{RESULTS}/dose_response.parquet",
        csv=report(
            f"{RESULTS}/dose_response.csv",
            caption="../report/dose_response.rst",
            category="Screen",
        ),
        points=f"{RESULTS}/screen/dose_response_points.parquet",
    log:
        f"{RESULTS}/logs/dose_response.log",
    benchmark:
        f"{RESULTS}/benchmarks/dose_response.tsv"
    conda:
        "../envs/plateloom.yaml"
    threads: 1
    resources:
        mem_mb=SCREEN_JOB.mem_mb,
        runtime=SCREEN_JOB.runtime_min,
    params:
        settings=SCREEN_SETTINGS,
    script:
        "../scripts/dose_response.py"


rule fate_effects:
    input:
        wells=ALL_WELL_TABLES,
        tracks=ALL_TRACK_FOLDERS,
    output:
        effects=FATE_TABLES["effects"],
        csv=report(
            f"{RESULTS}/fate_effects.csv",
            caption="../report/fate_effects.rst",
            category="Screen",
        ),
        survival=FATE_TABLES["survival"],
        growth=FATE_TABLES["growth"],
        growth_csv=f"{RESULTS}/growth_inhibition.csv",
        gr_curves=FATE_TABLES["gr_curves"],
    log:
        f"{RESULTS}/logs/fate_effects.log",
    benchmark:
        f"{RESULTS}/benchmarks/fate_effects.tsv"
    conda:
        "../envs/plateloom.yaml"
    threads: 1
    resources:
        mem_mb=SCREEN_JOB.mem_mb,
        runtime=SCREEN_JOB.runtime_min,
    params:
        settings=SCREEN_SETTINGS,
    script:
        "../scripts/fate_effects.py"


rule design_check:
    input:
        model_wells=MODEL_WELLS,
        effects=EFFECTS,
    output:
        parquet=f"{RESULTS}/design_check.parquet",
        csv=report(
            f"{RESULTS}/design_check.csv",
            caption="../report/design_check.rst",
            category="Screen",
        ),
    log:
        f"{RESULTS}/logs/design_check.log",
    benchmark:
        f"{RESULTS}/benchmarks/design_check.tsv"
    conda:
        "../envs/plateloom.yaml"
    threads: 1
    resources:
        mem_mb=SCREEN_JOB.mem_mb,
        runtime=SCREEN_JOB.runtime_min,
    params:
        settings=SCREEN_SETTINGS,
    script:
        "../scripts/design_check.py"


rule screen_report:
    input:
        effects=EFFECTS,
        wells=ALL_WELL_TABLES,
        ledgers=ALL_LEDGERS,
        dose_response=f"{RESULTS}/dose_response.parquet",
        dose_points=f"{RESULTS}/screen/dose_response_points.parquet",
        variance=f"{RESULTS}/screen/batch_variance_shares.parquet",
        components=f"{RESULTS}/screen/batch_principal_components.parquet",
        design_check=f"{RESULTS}/design_check.parquet",
        model_wells=MODEL_WELLS,
        kinetics=[EFFECTS_OVER_TIME, KINETIC_SUMMARY] if KINETICS.enabled else [],
        thumbnails=ALL_THUMBNAIL_FOLDERS,
        fate=list(FATE_TABLES.values()),
    output:
        report=report(
            f"{RESULTS}/reports/screen.html",
            caption="../report/screen_report.rst",
            category="Screen",
        ),
        volcano=report(
            f"{RESULTS}/reports/figures/volcano.png",
            caption="../report/volcano.rst",
            category="Figures",
        ),
        batch_pca=report(
            f"{RESULTS}/reports/figures/batch_pca.png",
            caption="../report/batch_pca.rst",
            category="Figures",
        ),
        treatments=report(
            directory(f"{RESULTS}/reports/treatments"),
            patterns=["{name}.html"],
            caption="../report/treatment_pages.rst",
            category="Treatments",
        ),
    log:
        f"{RESULTS}/logs/screen_report.log",
    benchmark:
        f"{RESULTS}/benchmarks/screen_report.tsv"
    conda:
        "../envs/plateloom.yaml"
    threads: 2
    resources:
        mem_mb=SCREEN_JOB.mem_mb,
        runtime=SCREEN_JOB.runtime_min,
    params:
        settings=SCREEN_SETTINGS,
        onset_windows=KINETICS.onset_windows,
    script:
        "../scripts/screen_report.py"
