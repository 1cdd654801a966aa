"""Cell montages: crops of nuclei (``plateloom.well.snapshot.cell_crops``, written beside each well's
thumbnail) sampled deterministically across a treatment's plates and days, laid out in a grid
with the same contrast for every crop of a figure and a scale bar in micrometres."""

from __future__ import annotations

import os
from functools import lru_cache

import matplotlib.pyplot as plt
import numpy as np
import pandas as pd

TILES_PER_ROW = 12
SCALE_BAR_UM = 10.0


def crop_files(folders: list[str]) -> dict[tuple[str, str], str]:
    """(plate, well) -> path of the well's crops, from thumbnail folders .../plate=P/chunk-C."""
    found = {}
    for folder in folders:
        plate = os.path.basename(os.path.dirname(os.path.normpath(folder))).split("=", 1)[-1]
        for name in sorted(os.listdir(folder)) if os.path.isdir(folder) else []:
            if name.endswith(".npz"):
                found[(plate, name[: -len(".npz")])] = os.path.join(folder, name)
    return found


@lru_cache(maxsize=1024)
def _read_crops(path: str) -> tuple[np.ndarray, pd.DataFrame, float, list[str]]:
    """A well's crops file (read once per process: the controls appear on every treatment page):
    crops, their per-cell values (area_um2 always, other features when the file has them), pixel
    size (um) and channel names."""
    with np.load(path) as data:
        values = pd.DataFrame({"area_um2": data["area_um2"]})
        if "feature_names" in data.files:
            names = [str(n) for n in data["feature_names"]]
            extra = pd.DataFrame(data["feature_values"].reshape(len(values), len(names)), columns=names)
            values = pd.concat([values, extra.drop(columns=["area_um2"], errors="ignore")], axis=1)
        return data["crops"], values, float(data["pixel_size_um"]), [str(c) for c in data["channels"]]


def crop_feature_names(files: dict) -> set[str]:
    """The per-cell features every crops file carries (area_um2 at least); empty without files."""
    names = [set(_read_crops(path)[1].columns) for path in files.values()]
    return set.intersection(*names) if names else set()


def sample_crops(wells: pd.DataFrame, files: dict, per_well: int = 3, most: int = 24, order_by: str = "area_um2"):
    """Crops of the given wells (columns batch, plate, well), taken in turn from the plates (ordered
    by batch, plate, well) so that every day and plate is represented, ``per_well`` per well at
    most, ``most`` in all: (crops (n, channels, side, side), their ``order_by`` values, pixel size
    um, channels) ordered by ``order_by`` (a per-cell feature; NaN last); None when no well has crops."""
    ordered = wells.sort_values(["batch", "plate", "well"])
    queues = [list(g["well"]) for _, g in ordered.groupby(["batch", "plate"], sort=True, observed=True)]
    plates = [str(p) for p in ordered.drop_duplicates(["batch", "plate"])["plate"]]
    picked, values, pixel, channels = [], [], None, None
    taken = 0
    while taken < most and any(queues):
        for plate, queue in zip(plates, queues):
            if not queue or taken >= most:
                continue
            path = files.get((plate, str(queue.pop(0))))
            if path is None:
                continue
            crops, table, pixel, channels = _read_crops(path)
            # evenly spaced over the well's crops (which span its sizes), not its smallest
            chosen = np.unique(np.round(np.linspace(0, len(crops) - 1, min(per_well, most - taken, len(crops)))))
            chosen = chosen.astype(int)
            picked.append(crops[chosen])
            column = table[order_by] if order_by in table else pd.Series(np.nan, index=table.index)
            values.append(column.to_numpy(float)[chosen])
            taken += len(chosen)
    if not taken:
        return None
    crops, values = np.concatenate(picked), np.concatenate(values)
    order = np.argsort(np.where(np.isnan(values), np.inf, values), kind="stable")
    return crops[order], values[order], pixel, channels


def _contrast(groups: list[np.ndarray]) -> tuple[np.ndarray, np.ndarray]:
    """Per channel: the 1st and 99.5th percentiles over every crop of every group (one contrast)."""
    stacked = np.concatenate(groups)
    low = np.percentile(stacked, 1.0, axis=(0, 2, 3))
    high = np.percentile(stacked, 99.5, axis=(0, 2, 3))
    return low, np.maximum(high, low + 1e-6)


def _canvas(crops: np.ndarray, low: np.ndarray, high: np.ndarray) -> np.ndarray:
    """The crops as one grey image: a tile per cell (its channels side by side), TILES_PER_ROW a row."""
    n, channels, side, _ = crops.shape
    scaled = np.clip((crops - low[None, :, None, None]) / (high - low)[None, :, None, None], 0, 1)
    gap = 2
    tile_width = channels * side + (channels - 1) * gap
    rows = int(np.ceil(n / TILES_PER_ROW))
    canvas = np.ones((rows * (side + 3 * gap), min(n, TILES_PER_ROW) * (tile_width + 3 * gap)))
    for i in range(n):
        top, left = (i // TILES_PER_ROW) * (side + 3 * gap), (i % TILES_PER_ROW) * (tile_width + 3 * gap)
        for c in range(channels):
            x = left + c * (side + gap)
            canvas[top : top + side, x : x + side] = scaled[i, c]
    return canvas


def montage_figure(groups: list[tuple[str, np.ndarray]], pixel_size_um: float, channels: list[str]) -> plt.Figure:
    """One panel per (title, crops) group, every group with the same contrast per channel; each
    cell shows its channels side by side (in ``channels`` order); a scale bar of SCALE_BAR_UM."""
    low, high = _contrast([crops for _, crops in groups])
    canvases = [_canvas(crops, low, high) for _, crops in groups]
    width = max(c.shape[1] for c in canvases)
    heights = [c.shape[0] for c in canvases]
    figure_width = min(12.0, width / 40 + 1)
    drawn = sum(h / width * (figure_width - 0.4) + 0.35 for h in heights)  # panels fill the width
    figure, axes = plt.subplots(
        len(groups), 1, figsize=(figure_width, drawn), squeeze=False, gridspec_kw={"height_ratios": heights}
    )
    bar = SCALE_BAR_UM / pixel_size_um
    for axis, (title, _), canvas in zip(axes[:, 0], groups, canvases):
        axis.imshow(canvas, cmap="gray", vmin=0, vmax=1, interpolation="nearest")
        axis.plot([3, 3 + bar], [canvas.shape[0] - 4] * 2, color="#ffd400", linewidth=3)
        axis.set_title(f"{title} ({' | '.join(channels)} per cell; bar {SCALE_BAR_UM:g} um)", fontsize=8)
        axis.set_xlim(0, width)
        axis.axis("off")
    figure.tight_layout()
    return figure
