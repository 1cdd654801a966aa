"""A realistic widefield nuclear-stain simulator ("hard" scenario): the test bed for segmentation.

Unlike the quick demo's clean ellipses, a field here has what real images bring (an invented
scene, no real data): nuclear brightness log-normal over more than a 10x range, irregular
outlines, bright chromatin spots inside most nuclei, a few rounded-up (mitotic or dying) cells
that are small, saturated and surrounded by glow, dim out-of-focus nuclei, touching pairs of
unequal size and dense clusters, an uneven background, and Poisson-Gaussian camera noise with a
12-bit ceiling. The planted truth is a label image of the nominal nuclear outlines.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import ndimage

SATURATION = 4095  # 12-bit camera


@dataclass(frozen=True)
class FieldSettings:
    """Optics and scene of one simulated field (lengths in um, intensities in photo-electrons)."""

    size_px: int = 384
    pixel_size_um: float = 0.65
    n_nuclei: int = 60
    radius_um: float = 6.0
    radius_log_sd: float = 0.18
    brightness: float = 900.0  # median nuclear signal above background
    brightness_log_sd: float = 0.6  # 95% of nuclei within a 10x range
    rounded_fraction: float = 0.05  # small, very bright, saturated cells with glow
    out_of_focus_fraction: float = 0.08
    pair_fraction: float = 0.3  # nuclei placed touching a neighbour (unequal sizes)
    cluster_size: int = 5  # one dense cluster of this many nuclei
    background: float = 200.0
    background_gradient: float = 0.5  # relative rise of the background across the field
    psf_sigma_px: float = 1.2
    read_noise: float = 6.0
    camera_offset: float = 100.0


@dataclass(frozen=True)
class Nuclei:
    """Centres (px), semi-axes (px), orientation (rad), brightness and kind of every nucleus."""

    y: np.ndarray
    x: np.ndarray
    major: np.ndarray
    minor: np.ndarray
    angle: np.ndarray
    level: np.ndarray
    kind: np.ndarray  # 0 normal, 1 rounded (saturated, glow), 2 out of focus
    wobble: np.ndarray | None = None  # (n, 4) outline irregularity; None: drawn afresh at rendering


def _free(y: np.ndarray, x: np.ndarray, r: np.ndarray, placed: np.ndarray, py: float, px: float, pr: float) -> bool:
    """True when a nucleus of radius ``pr`` at (py, px) overlaps none of the ``placed`` ones by more than 8%."""
    gaps = np.hypot(y[placed] - py, x[placed] - px) / (r[placed] + pr)
    return bool(np.all(gaps >= 0.9))


def _centres(rng: np.random.Generator, settings: FieldSettings, radius_px: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Positions: a dense cluster around the first nucleus, touching pairs (pressed to 0.92 of the
    sum of radii), the rest spread; a nucleus that finds no free place is dropped (NaN)."""
    n, size = len(radius_px), settings.size_px
    y, x = np.full(n, np.nan), np.full(n, np.nan)
    placed = np.zeros(n, bool)
    margin = 2 * radius_px.max()
    y[0], x[0] = rng.uniform(margin, size - margin, 2)
    placed[0] = True
    k = min(settings.cluster_size, n)
    for j, angle in enumerate(np.linspace(0, 2 * np.pi, k - 1, endpoint=False), start=1):
        reach = 0.92 * (radius_px[0] + radius_px[j])
        py, px = y[0] + reach * np.sin(angle), x[0] + reach * np.cos(angle)
        if _free(y, x, radius_px, placed, py, px, radius_px[j]):
            y[j], x[j], placed[j] = py, px, True
    i = k
    while i < n:
        for _ in range(200):
            py, px = rng.uniform(margin / 2, size - margin / 2, 2)
            if _free(y, x, radius_px, placed, py, px, radius_px[i] + 2):
                y[i], x[i], placed[i] = py, px, True
                break
        if placed[i] and i + 1 < n and rng.random() < settings.pair_fraction:
            direction = rng.uniform(0, 2 * np.pi)
            reach = 0.92 * (radius_px[i] + radius_px[i + 1])
            py, px = y[i] + reach * np.sin(direction), x[i] + reach * np.cos(direction)
            if _free(y, x, radius_px, placed, py, px, radius_px[i + 1]) and 0 <= py < size and 0 <= px < size:
                y[i + 1], x[i + 1], placed[i + 1] = py, px, True
            i += 1
        i += 1
    return y, x


def draw_nuclei(rng: np.random.Generator, settings: FieldSettings) -> Nuclei:
    """Random nuclei of one field."""
    n = settings.n_nuclei
    radius = settings.radius_um / settings.pixel_size_um * np.exp(rng.normal(0, settings.radius_log_sd, n))
    kind = np.zeros(n, int)
    draw = rng.random(n)
    kind[draw < settings.rounded_fraction] = 1
    kind[(draw >= settings.rounded_fraction) & (draw < settings.rounded_fraction + settings.out_of_focus_fraction)] = 2
    radius = np.where(kind == 1, 0.6 * radius, radius)  # rounded-up cells are compact
    elongation = np.where(kind == 1, 1.0, np.exp(np.abs(rng.normal(0, 0.2, n))))
    level = settings.brightness * np.exp(rng.normal(0, settings.brightness_log_sd, n))
    level = np.where(kind == 1, rng.uniform(8, 15, n) * settings.brightness, level)
    level = np.where(kind == 2, 0.5 * level, level)
    y, x = _centres(rng, settings, radius)
    angle = rng.uniform(0, np.pi, n)
    keep = np.isfinite(y)
    major, minor = radius * np.sqrt(elongation), radius / np.sqrt(elongation)
    return Nuclei(y[keep], x[keep], major[keep], minor[keep], angle[keep], level[keep], kind[keep])


def _normalised_distance(nuclei: Nuclei, i: int, yy: np.ndarray, xx: np.ndarray, wobble: np.ndarray) -> np.ndarray:
    """Distance from nucleus ``i``'s centre in units of its (irregular) outline: < 1 is inside."""
    dy, dx = yy - nuclei.y[i], xx - nuclei.x[i]
    c, s = np.cos(nuclei.angle[i]), np.sin(nuclei.angle[i])
    u, v = (dx * c + dy * s) / nuclei.major[i], (-dx * s + dy * c) / nuclei.minor[i]
    theta = np.arctan2(v, u)
    outline = 1 + wobble[0] * np.cos(2 * theta + wobble[1]) + wobble[2] * np.cos(3 * theta + wobble[3])
    return np.hypot(u, v) / outline


def render_field(rng: np.random.Generator, settings: FieldSettings, nuclei: Nuclei) -> tuple[np.ndarray, np.ndarray]:
    """(image as uint16 grey levels, truth labels 1..n) of one field."""
    size = settings.size_px
    nearest = np.full((size, size), np.inf)
    truth = np.zeros((size, size), np.int32)
    signal = np.zeros((size, size))
    blurred_signal = np.zeros((size, size))
    glow_source = np.zeros((size, size))  # rounded cells scatter light around them (glow)
    for i in range(len(nuclei.y)):
        reach = int(np.ceil(1.4 * nuclei.major[i])) + 2
        y0, y1 = max(0, int(nuclei.y[i]) - reach), min(size, int(nuclei.y[i]) + reach + 1)
        x0, x1 = max(0, int(nuclei.x[i]) - reach), min(size, int(nuclei.x[i]) + reach + 1)
        yy, xx = np.mgrid[y0:y1, x0:x1]
        wobble = (
            [rng.uniform(0, 0.08), rng.uniform(0, 2 * np.pi), rng.uniform(0, 0.05), rng.uniform(0, 2 * np.pi)]
            if nuclei.wobble is None
            else nuclei.wobble[i]
        )
        distance = _normalised_distance(nuclei, i, yy, xx, wobble)
        inside = distance < 1
        box = (slice(y0, y1), slice(x0, x1))
        closer = inside & (distance < nearest[box])
        truth[box][closer] = i + 1
        nearest[box][closer] = distance[closer]
        body = nuclei.level[i] * inside * (1 - 0.25 * distance**2)  # brighter towards the centre, as a sphere
        body += _chromatin_spots(rng, nuclei, i, yy, xx, inside) if nuclei.kind[i] == 0 else 0
        (blurred_signal if nuclei.kind[i] == 2 else signal)[box] += body
        if nuclei.kind[i] == 1:
            glow_source[box] += body
    glow_sigma_px = 2.0 * settings.radius_um / settings.pixel_size_um
    optics = (
        ndimage.gaussian_filter(signal, settings.psf_sigma_px)
        + ndimage.gaussian_filter(blurred_signal, 2 * settings.psf_sigma_px)
        + 0.25 * ndimage.gaussian_filter(glow_source, glow_sigma_px)
    )
    ramp = 1 + settings.background_gradient * np.linspace(0, 1, size)[None, :] * np.linspace(0.5, 1, size)[:, None]
    photons = rng.poisson(np.maximum(optics + settings.background * ramp, 0))
    image = photons + settings.camera_offset + rng.normal(0, settings.read_noise, (size, size))
    return np.clip(np.round(image), 0, SATURATION).astype(np.uint16), truth


def _chromatin_spots(
    rng: np.random.Generator, nuclei: Nuclei, i: int, yy: np.ndarray, xx: np.ndarray, inside: np.ndarray
) -> np.ndarray:
    """2-6 bright Gaussian spots (0.6-1.5 um) at random places inside nucleus ``i``."""
    spots = np.zeros(yy.shape)
    positions = np.argwhere(inside)
    if len(positions) == 0:
        return spots
    for _ in range(rng.integers(2, 7)):
        cy, cx = positions[rng.integers(len(positions))] + [yy[0, 0], xx[0, 0]]
        sigma = rng.uniform(0.9, 2.2)
        spots += rng.uniform(0.8, 2.5) * nuclei.level[i] * np.exp(-0.5 * ((yy - cy) ** 2 + (xx - cx) ** 2) / sigma**2)
    return spots * inside


def simulate_field(seed: int, settings: FieldSettings | None = None) -> tuple[np.ndarray, np.ndarray, Nuclei]:
    """One realistic field: (uint16 image, truth labels, the nuclei drawn)."""
    settings = settings or FieldSettings()
    rng = np.random.default_rng(seed)
    nuclei = draw_nuclei(rng, settings)
    image, truth = render_field(rng, settings, nuclei)
    return image, truth, nuclei
