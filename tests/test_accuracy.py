"""Segmentation and tracking accuracy on planted ground truth (simulated demo sites).

Segmentation: average precision over IoU thresholds 0.5-0.95 as in Caicedo et al. 2019
(Nat. Methods 16:1247). Tracking: CLEAR MOT accuracy (Bernardin & Stiefelhagen 2008) and IDF1
(Ristani et al. 2016), computed with the reference library ``motmetrics``.
"""

import numpy as np
import pytest
import tifffile
from conftest import ROOT
from segmentation_accuracy import (
    average_precision,
    iou_matrix,
    pooled_average_precision,
)

from plateloom.demo.scenario import QUANTITIES, load_scenario
from plateloom.demo.simulate import simulate_site, vignetting
from plateloom.io.images import index_plate_images
from plateloom.well.segment import segment_nuclei
from plateloom.well.stage import WellSettings, analyse_well

SCENARIO = str(ROOT / "resources/demo/scenario.yaml")


def test_average_precision_on_a_worked_example():
    # Worked by hand: true squares A (10x10) and B (10x10); prediction A' = A shifted by 2 columns
    # (IoU 80/120 = 0.667), B' = B exactly (IoU 1), and a false positive C. At IoU 0.5 TP = 2, FP = 1,
    # FN = 0 -> AP 2/3; at 0.7 only B matches: TP 1, FP 2, FN 1 -> AP 1/4.
    truth = np.zeros((40, 40), int)
    truth[0:10, 0:10], truth[20:30, 20:30] = 1, 2
    predicted = np.zeros((40, 40), int)
    predicted[0:10, 2:12], predicted[20:30, 20:30], predicted[32:36, 0:4] = 1, 2, 3
    np.testing.assert_allclose(iou_matrix(truth, predicted), [[80 / 120, 0, 0], [0, 1, 0]])
    ap = average_precision(truth, predicted, (0.5, 0.7))
    assert ap[0.5] == pytest.approx(2 / 3) and ap[0.7] == pytest.approx(1 / 4)


def _settings(scenario):
    # the demo run's settings (config/config.yaml)
    return WellSettings.of_demo(
        pixel_size_um=scenario["pixel_size_um"], frame_interval_min=scenario["frame_interval_min"], reporter_channels=()
    )


def _simulated_sites(density, sites, frames, seed):
    scenario = load_scenario(SCENARIO, frames=frames)
    scenario["cells_per_site"] = scenario["cells_per_site"] * density
    # nuclei of a monolayer touch but do not overlap: at twice the demo density the walk needs more
    # than the demo's one push-apart step per frame to keep them from sliding over each other
    scenario["cell"]["separation_iterations_per_frame"] = 1 if density == 1 else 10
    factor = {q: 1.0 for q in QUANTITIES}
    return scenario, [
        simulate_site(scenario, factor, np.random.default_rng([seed, site]), with_truth=True) for site in range(sites)
    ]


@pytest.mark.parametrize("density", [1, 2])
def test_segmentation_average_precision_on_planted_nuclei(density):
    scenario, sites = _simulated_sites(density, sites=6, frames=2, seed=31)
    flat = vignetting(scenario["image_size_px"], scenario["imaging"]["vignetting_corner"])
    pairs = []
    for stack, truth in sites:
        for frame in range(stack.shape[0]):
            labels, _ = segment_nuclei(stack[frame, 0] / flat, scenario["pixel_size_um"], 1.0, 30.0, 7.0)
            pairs.append((truth.labels[frame], labels))
    ap = pooled_average_precision(pairs)
    mean_ap = float(np.mean(list(ap.values())))
    print(f"density x{density}: AP@0.5 {ap[0.5]:.3f}, AP@0.75 {ap[0.75]:.3f}, mean AP 0.5-0.95 {mean_ap:.3f}")
    assert ap[0.5] >= 0.90
    assert mean_ap >= 0.5


@pytest.mark.parametrize("density", [1, 2])
def test_tracking_mota_and_idf1_with_motmetrics(tmp_path, density):
    motmetrics = pytest.importorskip("motmetrics")
    scenario, sites = _simulated_sites(density, sites=3, frames=16, seed=47)
    flat = vignetting(scenario["image_size_px"], scenario["imaging"]["vignetting_corner"])
    accumulator = motmetrics.MOTAccumulator(auto_id=True)
    for site, (stack, _truth) in enumerate(sites, start=1):
        for channel, name in enumerate(("nuclear", "reporter")):
            corrected = np.clip(stack[:, channel] / flat, 0, 65535).astype(np.uint16)
            tifffile.imwrite(tmp_path / f"B02_s{site}_{name}.tif", corrected, photometric="minisblack")
    index = index_plate_images(str(tmp_path), "{well}_s{site}_{channel}.tif", 96, ["nuclear", "reporter"])
    cells, _, _ = analyse_well(index, "B02", _settings(scenario))
    for site, (_, truth) in enumerate(sites, start=1):
        found = cells[cells["site"] == site]
        for frame in range(scenario["frames"]):
            expected = truth.positions[truth.positions["frame"] == frame]
            hypothesis = found[found["frame"] == frame]
            distances = motmetrics.distances.norm2squared_matrix(
                expected[["x_um", "y_um"]].to_numpy(),
                hypothesis[["centroid_x_um", "centroid_y_um"]].to_numpy(),
                max_d2=4.0**2,
            )
            accumulator.update((site * 10000 + expected["cell"]).tolist(), hypothesis["track"].tolist(), distances)
    summary = motmetrics.metrics.create().compute(
        accumulator,
        metrics=["mota", "idf1", "num_switches", "num_misses", "num_false_positives", "num_objects"],
        name="x",
    )
    mota, idf1 = float(summary["mota"].iloc[0]), float(summary["idf1"].iloc[0])
    print(f"density x{density}:", summary.to_dict("records"))
    assert mota >= 0.95
    assert idf1 >= 0.90
