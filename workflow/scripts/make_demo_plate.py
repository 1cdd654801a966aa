"""Rule make_demo_plate: simulate one plate of the embedded demo screen."""

from plateloom.demo.scenario import load_scenario
from plateloom.demo.simulate import write_demo_plate
from plateloom.io.job import run_step
from plateloom.setup.screen_sheet import load_layout

sm = snakemake  # noqa: F821  (injected by Snakemake's script directive)


def step() -> None:
    scenario = load_scenario(sm.input.scenario, sm.params.frames, sm.params.image_size_px, sm.params.size)
    layout = load_layout(sm.input.layout, sm.params.plate_format)
    write_demo_plate(scenario, layout, sm.wildcards.plate, sm.params.batch, sm.output.images)


run_step(sm.log[0], step, f"make_demo_plate {sm.wildcards.plate}")
