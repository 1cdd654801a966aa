"""Rule analyse_wells: segment, track and measure one chunk of wells of one plate."""

import os

import numpy as np
import tifffile

from plateloom.io.images import index_plate_images
from plateloom.io.job import run_step
from plateloom.well.chunk import ChunkOutputs, analyse_chunk
from plateloom.well.collective import CollectiveSettings
from plateloom.well.stage import WellSettings

sm = snakemake  # noqa: F821  (injected by Snakemake's script directive)


def step() -> None:
    settings = WellSettings(**sm.params.settings)
    index = index_plate_images(
        sm.params.image_folder, sm.params.template, sm.params.plate_format, list(settings.channels)
    )
    os.makedirs(sm.output.labels, exist_ok=True)  # empty unless segmentation.export_labels
    profiles = list(sm.input.flat_fields)
    flat_field = np.stack([tifffile.imread(path) for path in profiles]) if profiles else None
    analyse_chunk(
        index,
        sm.wildcards.plate,
        list(sm.params.wells),
        settings,
        ChunkOutputs(
            sm.output.cells,
            sm.output.tracks,
            sm.output.site_qc,
            sm.output.collective,
            sm.output.thumbnails,
            sm.output.labels if sm.params.export_labels else None,
            sm.output.events,
        ),
        dict(sm.params.settings),
        flat_field,
        CollectiveSettings(**sm.params.collective),
    )


run_step(sm.log[0], step, f"analyse_wells {sm.wildcards.plate} chunk {sm.wildcards.chunk}")
