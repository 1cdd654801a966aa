# The embedded demo screen: images are simulated from resources/demo/scenario.yaml.

from plateloom.plan import DEMO_IMAGE_ROOT

DEMO = config["demo"]


rule make_demo_plate:
    input:
        scenario=DEMO["scenario"],
        layout=lambda w: PLAN.plates[w.plate].layout,
    output:
        images=directory(f"{DEMO_IMAGE_ROOT}/{{plate}}"),
    params:
        batch=lambda w: PLAN.plates[w.plate].batch,
        plate_format=lambda w: PLAN.plates[w.plate].plate_format,
        frames=DEMO.get("frames"),
        image_size_px=DEMO.get("image_size_px"),
    wildcard_constraints:
        plate="|".join(sorted(PLAN.demo_plates)) or "no-demo-plate",
    log:
        f"{RESULTS}/logs/make_demo_plate/{{plate}}.log",
    benchmark:
        f"{RESULTS}/benchmarks/make_demo_plate/{{plate}}.tsv"
    threads: 1
    resources:
        mem_mb=1000,
        runtime=30,
    script:
        "../../scripts/steps/make_demo_plate.py"
