"""Per-observation measures in physical units, vectorised over labels."""

from __future__ import annotations

import numpy as np
import pandas as pd
from skimage.measure import regionprops_table

SHAPE_PROPERTIES = ("label", "area", "perimeter", "eccentricity", "solidity", "centroid", "bbox", "intensity_mean")


def measure_objects(labels: np.ndarray, planes: np.ndarray, channels: list[str], background: np.ndarray,
                    pixel_size_um: float) -> pd.DataFrame:
    """Measure every labelled object of one frame.

    ``planes`` is (channels, y, x); ``background`` the per-channel background level that is
    subtracted from intensities. Columns: object, area_um2, perimeter_um, eccentricity,
    solidity, centroid_x_um, centroid_y_um, touches_border, and per channel c
    mean_intensity_<c> (grey levels above background) and integrated_intensity_<c>
    (mean above background x area in pixels).
    """
    columns = ["object", "area_um2", "perimeter_um", "eccentricity", "solidity", "centroid_x_um", "centroid_y_um",
               "touches_border"] + [f"{kind}_intensity_{c}" for c in channels for kind in ("mean", "integrated")]
    if labels.max() == 0:
        return pd.DataFrame({c: pd.Series(dtype="bool" if c == "touches_border" else "int64" if c == "object" else "float64")
                             for c in columns})
    props = regionprops_table(labels, intensity_image=np.moveaxis(planes, 0, -1), properties=SHAPE_PROPERTIES)
    height, width = labels.shape
    area_px = props["area"].astype(float)
    table = {
        "object": props["label"].astype(np.int64),
        "area_um2": area_px * pixel_size_um**2,
        "perimeter_um": props["perimeter"] * pixel_size_um,
        "eccentricity": props["eccentricity"],
        "solidity": props["solidity"],
        "centroid_x_um": props["centroid-1"] * pixel_size_um,
        "centroid_y_um": props["centroid-0"] * pixel_size_um,
        "touches_border": (props["bbox-0"] == 0) | (props["bbox-1"] == 0) | (props["bbox-2"] == height) | (props["bbox-3"] == width),
    }
    for index, channel in enumerate(channels):
        mean = props[f"intensity_mean-{index}"] - background[index]
        table[f"mean_intensity_{channel}"] = mean
        table[f"integrated_intensity_{channel}"] = mean * area_px
    return pd.DataFrame(table)[columns]
