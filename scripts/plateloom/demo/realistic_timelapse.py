"""A realistic time-lapse of nuclei ("hard" scenario over time): the test bed for tracking.

The fields of ``plateloom.demo.realistic`` set in motion (an invented scene, no real data): every
nucleus moves on a persistent random walk (velocity an Ornstein-Uhlenbeck process, the persistent
random walk model of cell motility; common practice) with its own speed, log-normal over slow and
fast movers; nuclei push each other apart instead of overlapping; some cells round up (saturated,
with glow) and divide into two smaller daughters, some condense, stop and vanish (death). The
planted truth is a label image per frame whose labels are cell ids (a daughter gets a new id)
and a table of true positions and events.
"""

from __future__ import annotations

from dataclasses import dataclass, field, fields, replace

import numpy as np
import pandas as pd
from scipy.spatial import cKDTree

from plateloom.demo.realistic import FieldSettings, Nuclei, draw_nuclei, render_field

PRESSED = 1.05  # nuclei keep this share of the sum of their radii apart (cytoplasm between them)
DEATH_FRAMES = 2  # a dying cell is seen condensed for this many frames, then is gone


@dataclass(frozen=True)
class TimeLapseSettings:
    """Motion and events of a simulated time-lapse (speeds in um/min, times in frames)."""

    frames: int = 12
    frame_interval_min: float = 5.0
    speed_um_per_min: float = 1.0  # median speed of the cells
    speed_log_sd: float = 0.25  # cell-to-cell spread of speed (slow and fast movers)
    persistence: float = 0.8  # correlation of a cell's velocity from one frame to the next
    division_fraction: float = 0.08
    death_fraction: float = 0.06
    field: FieldSettings = field(default_factory=lambda: FieldSettings(size_px=512, n_nuclei=30, cluster_size=1))


@dataclass(frozen=True)
class TimeLapse:
    """Images (frames, y, x) uint16, truth labels (frames, y, x) holding cell ids, and the truth
    table: frame, cell, y_um, x_um, parent (0: none), event ('', rounding, division, death)."""

    images: np.ndarray
    truth: np.ndarray
    cells: pd.DataFrame


@dataclass
class _Cells:
    """The living cells of one frame (arrays in px, per cell)."""

    nuclei: Nuclei
    ids: np.ndarray
    velocity: np.ndarray  # (n, 2) px per frame
    speed_sd: np.ndarray  # per-axis velocity SD, px per frame
    divide_at: np.ndarray  # frame of division, -1 never
    die_at: np.ndarray  # frame the cell condenses, -1 never

    def take(self, keep: np.ndarray) -> _Cells:
        n = self.nuclei
        taken = Nuclei(*(getattr(n, f.name)[keep] for f in fields(Nuclei)))
        return _Cells(
            taken, self.ids[keep], self.velocity[keep], self.speed_sd[keep], self.divide_at[keep], self.die_at[keep]
        )


def _start(rng: np.random.Generator, settings: TimeLapseSettings) -> _Cells:
    nuclei = draw_nuclei(rng, settings.field)
    n = len(nuclei.y)
    nuclei = replace(
        nuclei,
        wobble=np.column_stack(
            [
                rng.uniform(0, 0.08, n),
                rng.uniform(0, 2 * np.pi, n),
                rng.uniform(0, 0.05, n),
                rng.uniform(0, 2 * np.pi, n),
            ]
        ),
    )
    step_px = settings.speed_um_per_min * settings.frame_interval_min / settings.field.pixel_size_um
    # a 2-D Gaussian velocity of per-axis SD s has mean length s sqrt(pi/2)
    speed_sd = step_px * np.exp(rng.normal(0, settings.speed_log_sd, n)) / np.sqrt(np.pi / 2)
    velocity = rng.normal(0, 1, (n, 2)) * speed_sd[:, None]
    normal = nuclei.kind == 0
    event = rng.random(n)
    when = rng.integers(2, max(3, settings.frames - 2), n)
    divide_at = np.where(normal & (event < settings.division_fraction), when, -1)
    dies = (
        normal & (event >= settings.division_fraction) & (event < settings.division_fraction + settings.death_fraction)
    )
    die_at = np.where(dies, when, -1)
    return _Cells(nuclei, np.arange(1, n + 1), velocity, speed_sd, divide_at, die_at)


def _push_apart(y: np.ndarray, x: np.ndarray, radius: np.ndarray, size: int) -> tuple[np.ndarray, np.ndarray]:
    """Centres moved so that no two nuclei overlap beyond PRESSED and all stay inside the field."""
    for _ in range(10):
        pairs = cKDTree(np.column_stack([y, x])).query_pairs(2 * radius.max(), output_type="ndarray")
        if len(pairs) == 0:
            break
        i, j = pairs.T
        dy, dx = y[j] - y[i], x[j] - x[i]
        distance = np.maximum(np.hypot(dy, dx), 1e-6)
        overlap = PRESSED * (radius[i] + radius[j]) - distance
        close = overlap > 0
        if not close.any():
            break
        push = 0.5 * overlap[close] / distance[close]
        np.add.at(y, i[close], -push * dy[close])
        np.add.at(x, i[close], -push * dx[close])
        np.add.at(y, j[close], push * dy[close])
        np.add.at(x, j[close], push * dx[close])
    return np.clip(y, radius, size - 1 - radius), np.clip(x, radius, size - 1 - radius)


def _move(rng: np.random.Generator, cells: _Cells, settings: TimeLapseSettings) -> _Cells:
    rho = settings.persistence
    noise = rng.normal(0, 1, cells.velocity.shape) * cells.speed_sd[:, None]
    velocity = rho * cells.velocity + np.sqrt(1 - rho**2) * noise
    velocity[cells.nuclei.kind == 1] *= 0.2  # rounded cells hardly move
    n = cells.nuclei
    radius = np.sqrt(n.major * n.minor)
    y, x = _push_apart(n.y + velocity[:, 0], n.x + velocity[:, 1], radius, settings.field.size_px)
    return replace(cells, nuclei=replace(n, y=y, x=x), velocity=velocity)


def _round_up(nuclei: Nuclei, which: np.ndarray, brightness: float) -> Nuclei:
    """Cells ``which`` become small, round, saturated and glowing (kind 1)."""
    radius = np.sqrt(nuclei.major * nuclei.minor)
    small = np.where(which, 0.65 * radius, np.nan)
    return replace(
        nuclei,
        major=np.where(which, small, nuclei.major),
        minor=np.where(which, small, nuclei.minor),
        level=np.where(which, 10 * brightness, nuclei.level),
        kind=np.where(which, 1, nuclei.kind),
    )


def _events(
    rng: np.random.Generator, cells: _Cells, frame: int, next_id: int, brightness: float
) -> tuple[_Cells, list, int]:
    """Rounding before division, division into two daughters, death; returns (cells, events, next id)."""
    events = []
    rounding = (cells.divide_at == frame + 1) | (cells.die_at == frame)
    for i in np.flatnonzero(rounding):
        events.append((cells.ids[i], "rounding" if cells.divide_at[i] == frame + 1 else "death", 0))
    cells = replace(cells, nuclei=_round_up(cells.nuclei, rounding, brightness))
    gone = (cells.die_at >= 0) & (frame >= cells.die_at + DEATH_FRAMES)
    cells = cells.take(~gone)
    dividing = np.flatnonzero(cells.divide_at == frame)
    if len(dividing) == 0:
        return cells, events, next_id
    mothers = cells.take(dividing)
    axis = rng.uniform(0, 2 * np.pi, len(dividing))
    direction = np.column_stack([np.sin(axis), np.cos(axis)])
    daughters = []
    for sign in (-1, 1):
        n = mothers.nuclei
        radius = 0.8 * np.sqrt(n.major * n.minor) / 0.65  # back from the rounded size, a bit smaller
        level = brightness * np.exp(rng.normal(0, 0.3, len(dividing)))
        centre = np.column_stack([n.y, n.x]) + sign * 0.9 * radius[:, None] * direction
        shape = {"major": radius, "minor": 0.9 * radius, "level": level, "kind": np.zeros(len(dividing), int)}
        ids = next_id + np.arange(len(dividing))
        next_id += len(dividing)
        daughters.append(
            replace(
                mothers,
                nuclei=replace(n, y=centre[:, 0], x=centre[:, 1], **shape),
                ids=ids,
                velocity=sign * mothers.speed_sd[:, None] * direction,
                divide_at=np.full(len(dividing), -1),
            )
        )
        events.extend((d, "division", m) for d, m in zip(ids, mothers.ids))
    keep = cells.take(cells.divide_at != frame)
    return _concat([keep, *daughters]), events, next_id


def _concat(parts: list[_Cells]) -> _Cells:
    nuclei = Nuclei(*(np.concatenate([getattr(p.nuclei, f.name) for p in parts]) for f in fields(Nuclei)))
    arrays = [
        np.concatenate([getattr(p, f) for p in parts]) for f in ("ids", "velocity", "speed_sd", "divide_at", "die_at")
    ]
    return _Cells(nuclei, *arrays)


def simulate_time_lapse(seed: int, settings: TimeLapseSettings | None = None) -> TimeLapse:
    """A realistic time-lapse of one site: images, truth labels (cell ids) and the truth table."""
    settings = settings or TimeLapseSettings()
    rng = np.random.default_rng(seed)
    cells = _start(rng, settings)
    next_id = len(cells.ids) + 1
    images, truth, rows = [], [], []
    for frame in range(settings.frames):
        if frame:
            cells = _move(rng, cells, settings)
        cells, events, next_id = _events(rng, cells, frame, next_id, settings.field.brightness)
        image, labels = render_field(rng, settings.field, cells.nuclei)
        images.append(image)
        truth.append(np.where(labels > 0, np.append(0, cells.ids)[labels], 0))
        parent = {d: m for d, kind, m in events if kind == "division"}
        event = {c: kind for c, kind, _ in events}
        um = settings.field.pixel_size_um
        rows.append(
            pd.DataFrame(
                {
                    "frame": frame,
                    "cell": cells.ids,
                    "y_um": cells.nuclei.y * um,
                    "x_um": cells.nuclei.x * um,
                    "parent": [parent.get(c, 0) for c in cells.ids],
                    "event": [event.get(c, "") for c in cells.ids],
                }
            )
        )
    return TimeLapse(np.stack(images), np.stack(truth).astype(np.int32), pd.concat(rows, ignore_index=True))
