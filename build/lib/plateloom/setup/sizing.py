"""Cluster job sizes (memory in MB, run time in minutes) from the size of the data, known at parse time.

The per-well stage streams one site frame by frame, so its memory is a fixed base plus a few
working copies of one frame of every channel plus one well's table; its run time scales with
the pixels it reads. The coefficients are config (``job_sizing``); the defaults were measured on
the demo screen (2-core workstation) and carry a safety factor.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

BASE_MB = 700  # Python, numpy, scikit-image, pandas, pyarrow loaded
FRAME_COPIES = 12  # float64 working arrays per channel frame (smoothing, labels, distance, ...)
BYTES_PER_OBSERVATION = 600  # one row of the cells table in memory, all columns
OBSERVATIONS_PER_MEGAPIXEL = 300


@dataclass(frozen=True)
class ImagingSize:
    """Expected size of one well's images."""

    side_px: int
    frames_per_site: int
    sites_per_well: int
    channels: int


@dataclass(frozen=True)
class JobSize:
    mem_mb: int
    runtime_min: int


def analyse_wells_size(
    size: ImagingSize, n_wells: int, seconds_per_megapixel_frame: float, safety_factor: float
) -> JobSize:
    """Memory and run time of one per-well job over ``n_wells`` wells."""
    megapixels = size.side_px**2 / 1e6
    frame_mb = FRAME_COPIES * size.channels * megapixels * 8
    well_table_mb = (
        size.sites_per_well
        * size.frames_per_site
        * megapixels
        * OBSERVATIONS_PER_MEGAPIXEL
        * BYTES_PER_OBSERVATION
        / 1e6
    )
    mem = safety_factor * (BASE_MB + frame_mb + well_table_mb)
    seconds = (
        n_wells * size.sites_per_well * size.frames_per_site * size.channels * megapixels * seconds_per_megapixel_frame
    )
    return JobSize(int(math.ceil(mem / 100) * 100), max(5, int(math.ceil(safety_factor * seconds / 60))))


def screen_size(n_wells: int, n_features: int, safety_factor: float) -> JobSize:
    """Memory and run time of a screen-level job over ``n_wells`` well profiles."""
    table_mb = n_wells * (n_features + 20) * 8 * 20 / 1e6  # profiles, corrected copy, design matrices
    mem = safety_factor * (BASE_MB + table_mb)
    return JobSize(int(math.ceil(mem / 100) * 100), max(10, int(math.ceil(safety_factor * n_wells * n_features / 2e4))))
