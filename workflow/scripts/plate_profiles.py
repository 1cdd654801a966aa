"""Rule plate_profiles: well profiles, exclusions, positional correction, normalization and QC of one plate."""

import json

from plateloom.io.images import unmatched_note
from plateloom.io.job import run_step
from plateloom.io.tables import write_parquet, write_text
from plateloom.plate.exclusions import ExclusionRules
from plateloom.plate.stage import PlateDesign, PlateSettings, WellTables, build_plate_tables_from_files, well_flags
from plateloom.plate.summaries import read_plate_dataset
from plateloom.plate.time_courses import TimeWindows
from plateloom.setup.screen_sheet import load_layout

sm = snakemake  # noqa: F821  (injected by Snakemake's script directive)


def step() -> None:
    layout = load_layout(sm.input.layout, sm.params.plate_format)
    settings = dict(sm.params.settings)
    well_tables = WellTables(
        read_plate_dataset(list(sm.input.tracks)),
        read_plate_dataset(list(sm.input.site_qc)),
        read_plate_dataset(list(sm.input.collective)),
    )
    design = PlateDesign(sm.wildcards.plate, sm.params.batch, sm.params.plate_format, layout)
    kinetics = settings["kinetics"]
    treated = sm.params.treatment_time_min
    windows = (
        TimeWindows(
            kinetics["window_min"],
            treated if treated is not None else 0.0,
            "treatment" if treated is not None else "first_frame",
            kinetics["max_control_drift"],
        )
        if kinetics["enabled"]
        else None
    )
    tables = build_plate_tables_from_files(
        list(sm.input.cells),
        well_tables,
        design,
        PlateSettings(**settings["plate"]),
        ExclusionRules(**settings["exclusion_rules"]),
        sm.threads,
        windows,
    )
    note = unmatched_note(sm.params.image_folder, sm.params.template, sm.params.plate_format, list(sm.params.channels))
    warnings = tables.warnings + ([note] if note else [])
    write_parquet(tables.profile, sm.output.wells, settings)
    write_parquet(tables.qc, sm.output.qc, settings)
    write_parquet(tables.ledger, sm.output.ledger, settings)
    write_parquet(tables.edge, sm.output.edge, settings)
    if tables.time_course is not None:
        write_parquet(tables.time_course, sm.output.time_courses, settings)
    write_text(
        json.dumps(
            {
                "plate": sm.wildcards.plate,
                "warnings": warnings,
                "site_qc": tables.site_summary,
                "flagged_wells": well_flags(well_tables.site_qc),
            },
            indent=1,
        ),
        sm.output.notes,
    )


run_step(sm.log[0], step, f"plate_profiles {sm.wildcards.plate}")
