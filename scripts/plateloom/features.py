"""Per-observation measures in physical units, vectorised over labels."""

from __future__ import annotations

import numpy as np
import pandas as pd
from scipy.spatial import cKDTree
from skimage.measure import regionprops_table

SHAPE_PROPERTIES = ("label", "area", "perimeter", "eccentricity", "solidity", "centroid", "bbox", "intensity_mean",
                    "intensity_std", "axis_major_length", "axis_minor_length")


def measure_objects(labels: np.ndarray, planes: np.ndarray, channels: list[str], background: np.ndarray,
                    pixel_size_um: float) -> pd.DataFrame:
    """Measure every labelled object of one frame.

    ``planes`` is (channels, y, x); ``background`` the per-channel background level that is
    subtracted from intensities. Columns: object, area_um2, perimeter_um, eccentricity,
    solidity, major_axis_um, minor_axis_um, form_factor (4 pi area / perimeter^2, 1 for a
    disk), centroid_x_um, centroid_y_um, touches_border, and per channel c mean_intensity_<c>
    (grey levels above background), integrated_intensity_<c> (mean above background x area in
    pixels) and std_intensity_<c> (grey levels).
    """
    columns = (["object", "area_um2", "perimeter_um", "eccentricity", "solidity", "major_axis_um", "minor_axis_um",
                "form_factor", "centroid_x_um", "centroid_y_um", "touches_border"]
               + [f"{kind}_intensity_{c}" for c in channels for kind in ("mean", "integrated", "std")])
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
        "major_axis_um": props["axis_major_length"] * pixel_size_um,
        "minor_axis_um": props["axis_minor_length"] * pixel_size_um,
        "form_factor": np.where(props["perimeter"] > 0, 4 * np.pi * area_px / np.maximum(props["perimeter"], 1e-12) ** 2,
                                np.nan),
        "centroid_x_um": props["centroid-1"] * pixel_size_um,
        "centroid_y_um": props["centroid-0"] * pixel_size_um,
        "touches_border": (props["bbox-0"] == 0) | (props["bbox-1"] == 0) | (props["bbox-2"] == height) | (props["bbox-3"] == width),
    }
    for index, channel in enumerate(channels):
        mean = props[f"intensity_mean-{index}"] - background[index]
        table[f"mean_intensity_{channel}"] = mean
        table[f"integrated_intensity_{channel}"] = mean * area_px
        table[f"std_intensity_{channel}"] = props[f"intensity_std-{index}"]
    return pd.DataFrame(table)[columns]


def neighbourhood(xy_um: np.ndarray, radius_um: float) -> tuple[np.ndarray, np.ndarray]:
    """Per object: neighbours within ``radius_um`` (itself not counted) and nearest-neighbour distance (um).

    KD-tree queries over all objects at once; NaN distance when an object is alone in the frame.
    """
    n = len(xy_um)
    if n == 0:
        return np.zeros(0, np.int64), np.zeros(0)
    tree = cKDTree(xy_um)
    counts = tree.query_ball_point(xy_um, radius_um, return_length=True).astype(np.int64) - 1
    if n == 1:
        return counts, np.array([np.nan])
    distances, _ = tree.query(xy_um, k=2)
    return counts, distances[:, 1]
