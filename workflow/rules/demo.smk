# The embedded demo screen: images simulated from the packaged scenario (resources/demo/scenario.yaml).


rule make_demo_plate:
    input:
        scenario=DEMO_SCENARIO,
        layout=get_layout,
    output:
        images=directory(f"{DEMO_IMAGE_ROOT}/{{plate}}"),
    log:
        f"{RESULTS}/logs/make_demo_plate/{{plate}}.log",
    benchmark:
        f"{RESULTS}/benchmarks/make_demo_plate/{{plate}}.tsv"
    wildcard_constraints:
        plate="|".join(sorted(PLAN.demo_plates)) or "no-demo-plate",
    conda:
        "../envs/plateloom.yaml"
    threads: 1
    resources:
        mem_mb=1000,
        runtime=30,
    params:
        batch=get_batch,
        plate_format=get_plate_format,
        frames=DEMO.get("frames"),
        image_size_px=DEMO.get("image_size_px"),
        size=DEMO.get("size", "quick"),
    script:
        "../scripts/make_demo_plate.py"
