"""Rule estimate_illumination: the flat-field profile of one channel of one plate, from many sites."""

import logging

from plateloom.io.images import index_plate_images
from plateloom.io.job import run_step
from plateloom.io.tables import provenance, write_profile_tiff
from plateloom.well.illumination import IlluminationSettings, estimate_flat_field

sm = snakemake  # noqa: F821  (injected by Snakemake's script directive)


def step() -> None:
    settings = IlluminationSettings(**sm.params.settings)
    channels = list(sm.params.channels)
    index = index_plate_images(sm.params.image_folder, sm.params.template, sm.params.plate_format, channels)
    profile, n_planes, skipped = estimate_flat_field(
        index, sm.wildcards.channel, channels, settings, sm.params.pixel_size_um
    )
    for reason in skipped:
        logging.getLogger("plateloom").warning("site left out of the flat field: %s", reason)
    write_profile_tiff(
        profile,
        sm.output.profile,
        {
            "plate": sm.wildcards.plate,
            "channel": sm.wildcards.channel,
            "n_planes": n_planes,
            "skipped_sites": skipped,
            "settings": dict(sm.params.settings),
            "provenance": provenance(dict(sm.params.settings)),
        },
    )


run_step(sm.log[0], step, f"estimate_illumination {sm.wildcards.plate} {sm.wildcards.channel}")
