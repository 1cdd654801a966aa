"""Segmentation accuracy against ground-truth masks: IoU matching and average precision.

Average precision at an IoU threshold t is TP / (TP + FP + FN), where a true object and a
predicted object match when their intersection over union exceeds t (Caicedo et al. 2019,
Nat. Methods 16:1247). For t >= 0.5 a match is unique, so no assignment step is needed.
"""

from __future__ import annotations

import numpy as np

IOU_THRESHOLDS = tuple(np.round(np.arange(0.5, 1.0, 0.05), 2))


def iou_matrix(truth: np.ndarray, predicted: np.ndarray) -> np.ndarray:
    """Intersection over union of every (true label, predicted label) pair; rows 1..n_true, columns 1..n_pred."""
    n_true, n_pred = int(truth.max()), int(predicted.max())
    overlap = np.bincount(
        truth.ravel().astype(np.int64) * (n_pred + 1) + predicted.ravel(), minlength=(n_true + 1) * (n_pred + 1)
    ).reshape(n_true + 1, n_pred + 1)
    true_area, pred_area = overlap.sum(axis=1), overlap.sum(axis=0)
    intersection = overlap[1:, 1:].astype(float)
    union = true_area[1:, None] + pred_area[None, 1:] - intersection
    return np.divide(intersection, union, out=np.zeros_like(intersection), where=union > 0)


def average_precision(
    truth: np.ndarray, predicted: np.ndarray, thresholds: tuple[float, ...] = IOU_THRESHOLDS
) -> dict[float, float]:
    """AP = TP / (TP + FP + FN) at each IoU threshold (>= 0.5) for one label image pair.

    Objects present in neither image give AP 1 (nothing to find, nothing found).
    """
    iou = iou_matrix(truth, predicted)
    n_true, n_pred = iou.shape
    result = {}
    for threshold in thresholds:
        if threshold < 0.5:
            raise ValueError("matches are unique only for IoU thresholds of at least 0.5")
        tp = int((iou > threshold).sum())
        denominator = n_true + n_pred - tp
        result[float(threshold)] = tp / denominator if denominator else 1.0
    return result


def pooled_average_precision(
    pairs: list[tuple[np.ndarray, np.ndarray]], thresholds: tuple[float, ...] = IOU_THRESHOLDS
) -> dict[float, float]:
    """AP over many images: true positives, false positives and false negatives summed first."""
    totals = {float(t): [0, 0] for t in thresholds}
    for truth, predicted in pairs:
        iou = iou_matrix(truth, predicted)
        for threshold in thresholds:
            tp = int((iou > threshold).sum())
            totals[float(threshold)][0] += tp
            totals[float(threshold)][1] += iou.shape[0] + iou.shape[1] - tp
    return {t: (tp / denominator if denominator else 1.0) for t, (tp, denominator) in totals.items()}
