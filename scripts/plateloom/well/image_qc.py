"""Per-frame image measures for site QC: background level per channel, a focus score, and jumps of
the segmentation between the frames of a site."""

from __future__ import annotations

import numpy as np
import pandas as pd

from plateloom.well.morphology import block_reduce, maximum_square
from plateloom.well.thresholds import BACKGROUND_STRIDE, median_of_sorted

# The focus score's Laplacian is taken on every FOCUS_ROW_STRIDE-th row.
FOCUS_ROW_STRIDE = 4


def background_levels(planes: np.ndarray, labels: np.ndarray, margin_px: int = 3) -> np.ndarray:
    """Per-channel background (grey levels): median of pixels at least ``margin_px`` from any object.

    Taken on a grid of every BACKGROUND_STRIDE-th pixel: a grid pixel counts as background when
    no object pixel lies in its block or in the blocks within ``margin_px`` of it. A field
    almost full of cells falls back to the 5th percentile.
    """
    stride = BACKGROUND_STRIDE
    occupied = block_reduce(labels > 0, stride, np.logical_or)
    reach = -(-margin_px // stride)
    near = maximum_square(occupied, 2 * reach + 1) if occupied.any() else occupied
    background = ~near
    sample = planes[:, ::stride, ::stride]
    if background.sum() < 0.05 * background.size:
        return np.percentile(sample.reshape(len(planes), -1), 5, axis=1)
    return np.array([median_of_sorted(np.sort(plane[background])) for plane in sample])


def focus_score(smooth: np.ndarray) -> float:
    """Variance of the Laplacian (Pech-Pacheco et al. 2000) of the smoothed image over its squared mean.

    ``smooth`` is the nuclear image after the segmentation's Gaussian smoothing. Unitless;
    sharp fields score high, defocused ones low. Dividing by the squared mean makes the score
    independent of exposure. The 5-point Laplacian is taken on every FOCUS_ROW_STRIDE-th interior
    row (a quarter of a million pixels of a 1024x1024 frame): the variance is the same to about
    a percent at a tenth of the cost of filtering the whole frame.
    """
    mean = float(smooth.mean())
    if not mean > 0 or min(smooth.shape) < 3:
        return float("nan")
    last = smooth.shape[0] - 1  # the rows 1, 1 + FOCUS_ROW_STRIDE, ... before it and their neighbours, as views
    centre = smooth[1:last:FOCUS_ROW_STRIDE]
    above, below = smooth[0 : last - 1 : FOCUS_ROW_STRIDE], smooth[2::FOCUS_ROW_STRIDE]
    laplacian = above[:, 1:-1] + below[: len(centre), 1:-1] + centre[:, :-2] + centre[:, 2:] - 4 * centre[:, 1:-1]
    return float(laplacian.var(dtype=np.float64) / mean**2)


# A frame whose foreground threshold differs from the previous usable frame of its site by more
# than THRESHOLD_JUMP_RATIO is flagged; so is a frame whose object count is a spike or a dip: it
# differs from both the previous and the next usable frame, in the same direction, by more than
# COUNT_JUMP_RATIO and COUNT_JUMP_MIN objects. Cells barely change between frames minutes apart,
# so such a jump is the segmentation changing; a steady rise or fall (growth, a wave of deaths) is not.
THRESHOLD_JUMP_RATIO = 1.3
COUNT_JUMP_RATIO = 1.5
COUNT_JUMP_MIN = 5


def segmentation_jumps(qc: pd.DataFrame) -> pd.DataFrame:
    """``qc`` (site QC rows of one or more sites: site, frame, threshold, n_objects) with boolean
    columns threshold_jump and count_jump (see the rules above)."""
    out = qc.copy()
    usable = (
        out["frame_problem"].fillna("").to_numpy(str) == ""
        if "frame_problem" in out.columns
        else np.ones(len(out), bool)
    )
    ordered = out[usable].sort_values(["site", "frame"])
    with np.errstate(divide="ignore", invalid="ignore"):
        log_threshold = np.log(ordered["threshold"].where(ordered["threshold"] > 0))
    threshold_step = log_threshold.groupby(ordered["site"]).diff().abs()
    counts = ordered["n_objects"].astype(float)
    by_site = counts.groupby(ordered["site"])
    before, after = by_site.shift(1), by_site.shift(-1)
    out["threshold_jump"] = False
    out["count_jump"] = False
    out.loc[ordered.index, "threshold_jump"] = (threshold_step > np.log(THRESHOLD_JUMP_RATIO)).to_numpy()
    up = _jumps(counts, before, 1) & _jumps(counts, after, 1)
    down = _jumps(counts, before, -1) & _jumps(counts, after, -1)
    out.loc[ordered.index, "count_jump"] = (up | down).to_numpy()
    return out


def _jumps(counts: pd.Series, other: pd.Series, sign: int) -> pd.Series:
    """Counts above (sign 1) or below (sign -1) ``other`` by more than COUNT_JUMP_RATIO and COUNT_JUMP_MIN."""
    ratio = sign * np.log((counts + 1) / (other + 1))
    return (ratio > np.log(COUNT_JUMP_RATIO)) & (sign * (counts - other) >= COUNT_JUMP_MIN)


def jumped_frames(site_qc: pd.DataFrame) -> pd.DataFrame:
    """The site-QC rows flagged with a threshold or count jump (none when the columns are absent)."""
    flags = [c for c in ("threshold_jump", "count_jump") if c in site_qc.columns]
    if not flags:
        return site_qc.iloc[:0]
    return site_qc[site_qc[flags].fillna(False).astype(bool).any(axis=1)]
