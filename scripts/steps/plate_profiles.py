"""Rule plate_profiles: well profiles, exclusions, robust z and plate QC of one plate."""
from plateloom.plate_stats import add_robust_z, apply_well_exclusions, plate_qc
from plateloom.profiles import read_plate_dataset, summarise_wells, well_features
from plateloom.screen import load_layout
from plateloom.steps import run_step
from plateloom.tables import write_parquet

sm = snakemake  # noqa: F821  (injected by Snakemake's script directive)


def step() -> None:
    layout = load_layout(sm.input.layout, sm.params.plate_format)
    cells = read_plate_dataset(list(sm.input.cells))
    tracks = read_plate_dataset(list(sm.input.tracks))
    profile = summarise_wells(cells, tracks, layout, sm.wildcards.plate, sm.params.batch, sm.params.plate_format)
    profile = apply_well_exclusions(profile, sm.params.min_cells_per_well)
    features = well_features(profile)
    profile = add_robust_z(profile, features)
    settings = dict(sm.params.settings)
    write_parquet(profile, sm.output.wells, settings)
    write_parquet(plate_qc(profile, features), sm.output.qc, settings)


run_step(sm.log[0], step, f"plate_profiles {sm.wildcards.plate}")
