"""The embedded demo screen: simulated live-cell plates with planted effects.

Cells are ellipses that move as a persistent random walk (Ornstein-Uhlenbeck velocity,
Fürth 1920), carry a nuclear stain and an oscillating nuclear reporter, and are imaged
with background, vignetting, blur and noise. The reporter couples neighbours: oscillator
phases pull towards the neighbours' (Kuramoto 1975) and a fluctuating component follows
the neighbours' previous values (a first-order vector autoregression), so neighbours
Granger-cause each other. Cells die at random and, when a neighbour died shortly before,
with an added chance (events that spread); a dying cell's reporter jumps in its last frame.
Treatments change nuclear area, reporter level, speed, neighbour coupling and death
spreading by Hill-equation ratios; days, plates, wells and edge wells add nuisance offsets
(not to coupling and spreading). Everything is drawn from generators seeded by the scenario seed and the plate
and batch names, so a plate's images do not depend on which other plates exist.
"""

from __future__ import annotations

import os
import zlib
from dataclasses import dataclass, replace

import numpy as np
import pandas as pd
import tifffile
from scipy import ndimage

from plateloom.demo.scenario import QUANTITIES, WITHOUT_NUISANCE, death_course, reporter_course, treatment_ratios
from plateloom.io.tables import atomic_path
from plateloom.setup.plate_formats import is_edge_well, plate_format


def _stable_rng(seed: int, *names: str) -> np.random.Generator:
    return np.random.default_rng([int(seed)] + [zlib.crc32(name.encode()) for name in names])


def _log_offsets(rng: np.random.Generator, sd: float) -> dict[str, float]:
    return {q: float(np.exp(rng.normal(0.0, sd))) for q in QUANTITIES if q not in WITHOUT_NUISANCE}


def vignetting(size: int, corner: float) -> np.ndarray:
    """Relative illumination, 1 at the centre falling quadratically to ``corner`` at the corners."""
    coords = (np.arange(size) - (size - 1) / 2) / ((size - 1) / 2)
    r2 = (coords[:, None] ** 2 + coords[None, :] ** 2) / 2.0
    return (1.0 - (1.0 - corner) * r2).astype(np.float32)


@dataclass
class _Cells:
    position: np.ndarray  # (n, 2) pixels, (y, x)
    velocity: np.ndarray  # (n, 2) um/min
    semi_major: np.ndarray  # pixels
    semi_minor: np.ndarray
    angle: np.ndarray
    nuclear: np.ndarray
    reporter: np.ndarray
    phase: np.ndarray
    frequency: np.ndarray  # rad/min
    fluctuation: np.ndarray  # relative reporter fluctuation
    identity: np.ndarray  # index at the start, daughters numbered on (truth labels are identity + 1)
    rounding: np.ndarray  # rounded up this frame (brighter, smaller), divides after it

    def keep(self, alive: np.ndarray) -> _Cells:
        return _Cells(*(getattr(self, f)[alive] for f in self.__dataclass_fields__))

    def take_rows(self, rows: np.ndarray) -> _Cells:
        return _Cells(*(getattr(self, f)[rows].copy() for f in self.__dataclass_fields__))

    def joined(self, other: _Cells) -> _Cells:
        return _Cells(*(np.concatenate([getattr(self, f), getattr(other, f)]) for f in self.__dataclass_fields__))


def _draw_cells(rng: np.random.Generator, scenario: dict, factor: dict[str, float], size: int) -> _Cells:
    cell = scenario["cell"]
    pixel = scenario["pixel_size_um"]
    n = int(rng.poisson(scenario["cells_per_site"] * factor["cell_count"]))
    radius = (
        cell["nucleus_radius_um"]
        / pixel
        * np.sqrt(factor["area"])
        * np.exp(rng.normal(0, cell["nucleus_radius_log_sd"], n))
    )
    elongation = np.exp(np.abs(rng.normal(0, cell["elongation_log_sd"], n)))
    semi_major, semi_minor = radius * np.sqrt(elongation), radius / np.sqrt(elongation)
    margin = semi_major + 3
    position = rng.uniform(margin[:, None], size - margin[:, None], (n, 2))
    sigma = cell["rms_speed_um_per_min"] * factor["speed"] / np.sqrt(2.0)
    velocity, angle = rng.normal(0, sigma, (n, 2)), rng.uniform(0, np.pi, n)
    nuclear = cell["nuclear_level"] * factor["nuclear"] * np.exp(rng.normal(0, cell["nuclear_level_log_sd"], n))
    reporter = cell["reporter_level"] * factor["reporter"] * np.exp(rng.normal(0, cell["reporter_level_log_sd"], n))
    phase = rng.uniform(0, 2 * np.pi, n)
    frequency = (
        2 * np.pi / cell["reporter_period_min"] * np.exp(rng.normal(0, cell.get("reporter_period_log_sd", 0.0), n))
    )
    return _Cells(
        position,
        velocity,
        semi_major,
        semi_minor,
        angle,
        nuclear,
        reporter,
        phase,
        frequency,
        np.zeros(n),
        np.arange(n),
        np.zeros(n, bool),
    )


def _neighbour_weights(cells: _Cells, radius_px: float) -> np.ndarray:
    """Row-normalised weights of the neighbours within ``radius_px``, (1 - distance / radius)^2, so the
    closest neighbours weigh most (a row of zeros for a cell without any)."""
    distance = np.hypot(*(cells.position[:, None, :] - cells.position[None, :, :]).transpose(2, 0, 1))
    weight = np.clip(1 - distance / radius_px, 0, None) ** 2 * ~np.eye(len(distance), dtype=bool)
    return weight / np.maximum(weight.sum(axis=1, keepdims=True), 1e-12)


def _advance_reporter(rng: np.random.Generator, cells: _Cells, scenario: dict, coupling: float) -> None:
    """One frame of the coupled reporter: Kuramoto phase pull and the neighbours-driven fluctuation."""
    cell, dt = scenario["cell"], scenario["frame_interval_min"]
    weights = _neighbour_weights(cells, cell["coupling_radius_um"] / scenario["pixel_size_um"])
    pull = (weights * np.sin(cells.phase[None, :] - cells.phase[:, None])).sum(axis=1)
    cells.phase[:] = cells.phase + dt * (cells.frequency + coupling * cell["phase_coupling_per_min"] * pull)
    memory, drive = (
        cell["fluctuation_memory"],
        min(coupling * cell["fluctuation_coupling"], 0.95 - cell["fluctuation_memory"]),
    )
    cells.fluctuation[:] = (
        memory * cells.fluctuation
        + drive * weights @ cells.fluctuation
        + rng.normal(0, cell["fluctuation_sd"], len(cells.fluctuation))
    )


def _dying(
    rng: np.random.Generator,
    cells: _Cells,
    scenario: dict,
    spreading: float,
    recent_deaths: np.ndarray,
    base_ratio: float = 1.0,
) -> np.ndarray:
    """Which cells die in this frame: a base hazard (times ``base_ratio``) plus a chance per neighbour
    that died within the last frames; a rounding cell does not die."""
    cell = scenario["cell"]
    if len(cells.position) == 0:
        return np.zeros(0, bool)
    radius = cell["coupling_radius_um"] / scenario["pixel_size_um"]
    if len(recent_deaths):
        distance = np.hypot(*(cells.position[:, None, :] - recent_deaths[None, :, :]).transpose(2, 0, 1))
        exposed = (distance <= radius).sum(axis=1)
    else:
        exposed = np.zeros(len(cells.position))
    spread = min(1.0, cell["death_spread_probability"] * spreading)
    base = min(1.0, cell["death_rate_per_frame"] * base_ratio)
    hazard = 1 - (1 - base) * (1 - spread) ** exposed
    return (rng.uniform(size=len(cells.position)) < hazard) & ~cells.rounding


ROUNDED_BRIGHTNESS, ROUNDED_RADIUS = 1.6, 0.8  # a mitotic nucleus condenses: brighter, smaller


def _as_imaged(cells: _Cells) -> tuple[_Cells, np.ndarray]:
    """The cells as drawn this frame (rounding cells smaller) and their nuclear levels (rounding brighter)."""
    shrink = np.where(cells.rounding, ROUNDED_RADIUS, 1.0)
    shown = replace(cells, semi_major=cells.semi_major * shrink, semi_minor=cells.semi_minor * shrink)
    return shown, cells.nuclear * np.where(cells.rounding, ROUNDED_BRIGHTNESS, 1.0)


def _divide(rng: np.random.Generator, cells: _Cells, next_id: int) -> tuple[_Cells, np.ndarray, int]:
    """Every rounding cell becomes two daughters one nuclear radius either side of it along a random
    axis (the mother's size, level and reporter state); returns the cells, each cell's mother
    identity (-1 for the others) and the next free identity."""
    mothers = np.flatnonzero(cells.rounding)
    parent = np.full(len(cells.identity), -1)
    if not len(mothers):
        return cells, parent, next_id
    angle = rng.uniform(0, np.pi, len(mothers))
    offset = cells.semi_major[mothers, None] * np.column_stack([np.sin(angle), np.cos(angle)])
    second = cells.take_rows(mothers)
    parent[mothers] = cells.identity[mothers]
    second_parent = cells.identity[mothers].copy()
    cells.position[mothers] += offset
    second.position -= offset
    cells.identity[mothers] = next_id + np.arange(len(mothers))
    second.identity[:] = next_id + len(mothers) + np.arange(len(mothers))
    cells.rounding[mothers] = False
    second.rounding[:] = False
    return cells.joined(second), np.r_[parent, second_parent], next_id + 2 * len(mothers)


def _step(rng: np.random.Generator, cells: _Cells, scenario: dict, speed_factor: float, size: int) -> None:
    """One frame of the persistent random walk, reflecting at the field edges, nuclei kept apart."""
    dt = scenario["frame_interval_min"]
    decay = np.exp(-dt / scenario["cell"]["persistence_min"])
    sigma = scenario["cell"]["rms_speed_um_per_min"] * speed_factor / np.sqrt(2.0)
    cells.position += cells.velocity * dt / scenario["pixel_size_um"]
    cells.velocity[:] = decay * cells.velocity + np.sqrt(1 - decay**2) * rng.normal(0, sigma, cells.velocity.shape)
    low, high = cells.semi_major[:, None] + 2, size - cells.semi_major[:, None] - 2
    below, above = cells.position < low, cells.position > high
    cells.position[:] = np.where(below, 2 * low - cells.position, cells.position)
    cells.position[:] = np.where(above, 2 * high - cells.position, cells.position)
    cells.velocity[below | above] *= -1
    _separate(cells, size, iterations=int(scenario["cell"].get("separation_iterations_per_frame", 1)))


def _separate(cells: _Cells, size: int, iterations: int) -> None:
    """Push overlapping nuclei apart (keeps identities clear), staying inside the field."""
    low, high = cells.semi_major[:, None] + 2, size - cells.semi_major[:, None] - 2
    for _ in range(iterations if len(cells.position) > 1 else 0):
        delta = cells.position[:, None, :] - cells.position[None, :, :]
        distance = np.sqrt((delta**2).sum(-1)) + np.eye(len(delta)) * 1e6
        overlap = np.clip(cells.semi_major[:, None] + cells.semi_major[None, :] + 2 - distance, 0, None)
        push = (delta / distance[..., None] * overlap[..., None] / 2).sum(1)
        cells.position[:] = np.clip(cells.position + push, low, high)


def _ellipse_boxes(cells: _Cells, size: int):
    """Per cell: the rows, columns and inside-mask of its ellipse, clipped to the field."""
    cos, sin = np.cos(cells.angle), np.sin(cells.angle)
    for i in range(len(cells.position)):  # per object, each vectorised over its bounding box
        y0, x0 = cells.position[i]
        reach = int(np.ceil(cells.semi_major[i])) + 1
        ys = np.arange(max(0, int(y0) - reach), min(size, int(y0) + reach + 2))
        xs = np.arange(max(0, int(x0) - reach), min(size, int(x0) + reach + 2))
        dy, dx = ys[:, None] - y0, xs[None, :] - x0
        u, v = dx * cos[i] + dy * sin[i], -dx * sin[i] + dy * cos[i]
        yield i, ys, xs, (u / cells.semi_major[i]) ** 2 + (v / cells.semi_minor[i]) ** 2 <= 1.0


def _render(cells: _Cells, levels: np.ndarray, size: int) -> np.ndarray:
    """Sum of uniformly bright ellipses (one per cell) on a zero background."""
    image = np.zeros((size, size), np.float32)
    for i, ys, xs, inside in _ellipse_boxes(cells, size):
        image[ys[0] : ys[-1] + 1, xs[0] : xs[-1] + 1] += levels[i] * inside
    return image


def _render_labels(cells: _Cells, size: int) -> np.ndarray:
    """Ground-truth label image: the cell drawn i-th at the start is label i + 1 (where ellipses
    overlap, the later cell's)."""
    labels = np.zeros((size, size), np.int32)
    for i, ys, xs, inside in _ellipse_boxes(cells, size):
        box = labels[ys[0] : ys[-1] + 1, xs[0] : xs[-1] + 1]
        box[inside] = cells.identity[i] + 1
    return labels


def _truth_rows(cells: _Cells, frame: int, pixel_um: float, dying: np.ndarray, parent: np.ndarray) -> pd.DataFrame:
    return pd.DataFrame(
        {
            "frame": frame,
            "cell": cells.identity,
            "x_um": cells.position[:, 1] * pixel_um,
            "y_um": cells.position[:, 0] * pixel_um,
            "dies": dying,
            "divides": cells.rounding.copy(),
            "parent": parent,
        }
    )


def _camera_image(drawn: np.ndarray, illumination: np.ndarray, imaging: dict, rng: np.random.Generator) -> np.ndarray:
    """A drawn channel through the microscope: blur, background, vignetting, Gaussian noise, 16 bits."""
    signal = ndimage.gaussian_filter(drawn, imaging["blur_sigma_px"])
    image = (signal + imaging["background"]) * illumination + rng.normal(0, imaging["noise_sd"], drawn.shape)
    return np.clip(np.rint(image), 0, 65535).astype(np.uint16)


@dataclass
class SiteTruth:
    """Planted truth of one simulated site: label images (frames, y, x) with cell i as label i + 1,
    and one row per cell and frame (frame, cell, x_um, y_um)."""

    labels: np.ndarray
    positions: pd.DataFrame


def simulate_site(
    scenario: dict,
    factor: dict[str, float],
    rng: np.random.Generator,
    with_truth: bool = False,
    reporter_course: np.ndarray | None = None,
    death_course: np.ndarray | None = None,
) -> np.ndarray | tuple[np.ndarray, SiteTruth]:
    """Images of one site: array (frames, 2 channels, y, x) uint16, nuclei then reporter.

    ``reporter_course`` (one ratio per frame) scales the reporter over time, ``death_course`` the
    base death hazard. A cell rounds up (``cell.division_rate_per_frame`` x the division factor)
    for one frame, then divides. With ``with_truth`` also the planted truth (the images are the
    same either way); its positions table has ``dies`` (True in a cell's last frame when it dies),
    ``divides`` (True in a mother's last frame) and ``parent`` (a daughter's mother, in the
    daughter's first frame; -1 otherwise).
    """
    size, frames = scenario["image_size_px"], scenario["frames"]
    imaging, cell = scenario["imaging"], scenario["cell"]
    cells = _draw_cells(rng, scenario, factor, size)
    _separate(cells, size, iterations=20)
    illumination = vignetting(size, imaging["vignetting_corner"])
    stack = np.empty((frames, 2, size, size), np.uint16)
    truth_labels = np.zeros((frames, size, size), np.int32) if with_truth else None
    positions = []
    recent_deaths: list[np.ndarray] = []
    parent, next_id = np.full(len(cells.identity), -1), len(cells.identity)
    p_division = cell.get("division_rate_per_frame", 0.0) * factor.get("division", 1.0)
    for frame in range(frames):
        recent = np.concatenate(recent_deaths[-cell["death_memory_frames"] :] or [np.empty((0, 2))])
        base_ratio = 1.0 if death_course is None else float(death_course[frame])
        dying = _dying(rng, cells, scenario, factor.get("spreading", 1.0), recent, base_ratio)
        oscillation = 1 + cell["reporter_oscillation_amplitude"] * np.sin(cells.phase) + cells.fluctuation
        reporter = cells.reporter * np.clip(oscillation, 0.05, None) * np.where(dying, cell["death_reporter_jump"], 1.0)
        if reporter_course is not None:
            reporter = reporter * reporter_course[frame]
        shown, nuclear = _as_imaged(cells)
        for channel, levels in enumerate((nuclear, reporter)):
            stack[frame, channel] = _camera_image(_render(shown, levels, size), illumination, imaging, rng)
        if with_truth:
            truth_labels[frame] = _render_labels(shown, size)
            positions.append(_truth_rows(cells, frame, scenario["pixel_size_um"], dying, parent))
        recent_deaths.append(cells.position[dying].copy())
        cells = cells.keep(~dying)
        cells, parent, next_id = _divide(rng, cells, next_id)
        cells.rounding[:] = (parent < 0) & (rng.uniform(size=len(parent)) < p_division)
        _advance_reporter(rng, cells, scenario, factor.get("coupling", 1.0))
        _step(rng, cells, scenario, factor["speed"], size)
    if not with_truth:
        return stack
    table = (
        pd.concat(positions, ignore_index=True)
        if positions
        else pd.DataFrame(columns=["frame", "cell", "x_um", "y_um", "dies", "divides", "parent"])
    )
    return stack, SiteTruth(truth_labels, table)


def well_factors(scenario: dict, plate: str, batch: str, well: str, condition: str, dose: float) -> dict[str, float]:
    """Product of treatment ratio and nuisance offsets (batch, plate, well, edge) per quantity."""
    nuisance, seed = scenario["nuisance"], scenario["seed"]
    batch_offset = _log_offsets(_stable_rng(seed, "batch", batch), nuisance["batch_log_sd"])
    plate_offset = _log_offsets(_stable_rng(seed, "plate", plate), nuisance["plate_log_sd"])
    well_offset = _log_offsets(_stable_rng(seed, "well", plate, well), nuisance["well_log_sd"])
    treatment = treatment_ratios(scenario, condition, dose)
    edge = is_edge_well(well, plate_format(scenario["plate_format"]))
    factor = {}
    for q in QUANTITIES:
        if q in WITHOUT_NUISANCE:
            factor[q] = treatment[q]
            continue
        edge_ratio = nuisance["edge_ratio"].get(q, 1.0) if edge else 1.0
        factor[q] = treatment[q] * batch_offset[q] * plate_offset[q] * well_offset[q] * edge_ratio
    return factor


def write_demo_plate(scenario: dict, layout: pd.DataFrame, plate: str, batch: str, folder: str) -> int:
    """Simulate every non-empty well of ``layout`` for one plate into ``folder``.

    Files follow the template '{well}_s{site}_{channel}.tif', one multi-page TIFF (a page per
    frame) per site and channel. Returns the number of files written.
    """
    os.makedirs(folder, exist_ok=True)
    names = [scenario["channels"]["nuclei"], scenario["channels"]["reporter"]]
    written = 0
    for _, row in layout[layout["role"] != "empty"].iterrows():
        dose = 0.0 if np.isnan(row["dose"]) else float(row["dose"])
        factor = well_factors(scenario, plate, batch, row["well"], row["condition"], dose)
        course = reporter_course(scenario, row["condition"], dose)
        deaths = death_course(scenario, row["condition"], dose)
        for site in range(1, scenario["sites_per_well"] + 1):
            rng = _stable_rng(scenario["seed"], "site", plate, row["well"], str(site))
            stack = simulate_site(scenario, factor, rng, reporter_course=course, death_course=deaths)
            for channel, name in enumerate(names):
                path = os.path.join(folder, f"{row['well']}_s{site}_{name}.tif")
                with atomic_path(path) as tmp:
                    tifffile.imwrite(tmp, stack[:, channel], compression="zlib", photometric="minisblack")
                written += 1
    return written
