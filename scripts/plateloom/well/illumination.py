"""Illumination (flat-field) correction: one profile per plate and channel, estimated from many sites.

Retrospective flat-field estimation (common practice): cells sit at different places in
different fields, so a low per-pixel percentile over many fields, each scaled by its own median,
follows the illumination and not the cells (a low percentile is less pulled up by cells than the
median). The percentile image is smoothed with a wide Gaussian and scaled to mean 1; images are
divided by it before segmentation and measurement, so intensities keep their units on average.
"""

from __future__ import annotations

from collections import Counter
from dataclasses import dataclass

import numpy as np
from scipy import ndimage

from plateloom.errors import InputError
from plateloom.io.images import ImageIndex, site_frame_count, stream_site
from plateloom.settings import FromSchema

METHODS = ("none", "percentile_of_sites")


@dataclass(frozen=True)
class IlluminationSettings(FromSchema):
    """How to estimate the flat field (physical units where they apply)."""

    SECTION = "illumination"

    method: str
    max_sites: int
    frames_per_site: int
    smoothing_sigma_um: float
    percentile: float


def sampled_sites(index: ImageIndex, max_sites: int) -> list[tuple[str, int]]:
    """Up to ``max_sites`` (well, site) pairs spread evenly over the plate, in a fixed order (deterministic)."""
    pairs = sorted(set(zip(index.table["well"], index.table["site"].astype(int))))
    if len(pairs) <= max_sites:
        return pairs
    picks = np.linspace(0, len(pairs) - 1, max_sites).round().astype(int)
    return [pairs[i] for i in np.unique(picks)]


def flat_field_from_planes(planes: np.ndarray, sigma_px: float, percentile: float = 25.0) -> np.ndarray:
    """Flat-field profile (mean 1) from a stack of planes (n, y, x) of one channel; ``sigma_px`` in pixels."""
    planes = np.asarray(planes, np.float32)
    scale = np.median(planes.reshape(len(planes), -1), axis=1)
    if np.any(scale <= 0):
        scale = np.where(scale > 0, scale, np.mean(planes.reshape(len(planes), -1), axis=1))
    if np.any(scale <= 0):
        raise InputError(
            "illumination estimate",
            "a sampled image is black (median and mean 0).",
            "exclude black sites or set illumination.method: none.",
        )
    profile = np.percentile(planes / scale[:, None, None], percentile, axis=0)
    profile = ndimage.gaussian_filter(profile, sigma_px, mode="nearest")
    return (profile / profile.mean()).astype(np.float32)


def _sampled_planes(
    index: ImageIndex, well: str, site: int, channel: str, frames_per_site: int
) -> tuple[list[np.ndarray], list[str]]:
    """Up to ``frames_per_site`` planes of one channel of a site, spread over its frames, and the
    problems of the frames that could not be read."""
    # only this channel is read; the per-well jobs check that all channels of a site agree
    n_frames = site_frame_count(index, well, site, [channel])
    wanted = set(np.linspace(0, n_frames - 1, min(frames_per_site, n_frames)).round().astype(int).tolist())
    planes, problems = [], []
    frames = stream_site(index, well, site, [channel])
    try:
        for position, item in enumerate(frames):
            if position in wanted:
                if item.problem:
                    problems.append(item.problem)
                else:
                    planes.append(item.planes[0])
            if position >= max(wanted):
                break
    finally:
        frames.close()
    return planes, problems


def _usable_planes(by_site: dict[tuple[str, int], list[np.ndarray]], skipped: list[str]) -> list[np.ndarray]:
    """The planes of the sites fit for a flat field; the others named in ``skipped`` (in place):
    a site whose image size is not the plate's (the size of most sampled sites), or that is
    black or has a non-positive median (no brightness scale)."""
    sizes = Counter(planes[0].shape for planes in by_site.values())
    plate_size = max(sizes, key=lambda size: (sizes[size], size)) if sizes else None
    usable = []
    for (well, site), planes in by_site.items():
        if planes[0].shape != plate_size:
            skipped.append(
                f"well {well}, site {site}: image size {planes[0].shape} differs from the plate's {plate_size} "
                "(the size of most sampled sites)"
            )
        elif np.median(np.stack(planes)) <= 0:
            skipped.append(f"well {well}, site {site}: black or non-positive median, no brightness to scale by")
        else:
            usable += planes
    return usable


def estimate_flat_field(
    index: ImageIndex, channel: str, channels: list[str], settings: IlluminationSettings, pixel_size_um: float
) -> tuple[np.ndarray, int, list[str]]:
    """Profile of one channel of one plate, the number of planes used, and the sites skipped (with why).

    A sampled site that cannot be read, is black, has a non-positive median or is not of the
    plate's image size is skipped and named (its own per-well job flags it); the estimate fails
    only when fewer than 3 planes are left.
    """
    if channel not in channels:
        raise InputError(
            f"illumination of channel {channel}",
            f"channel {channel!r} is not in config channels {channels}.",
            "use a channel name from config channels.",
        )
    by_site, skipped = {}, []
    for well, site in sampled_sites(index, settings.max_sites):
        try:
            site_planes, problems = _sampled_planes(index, well, site, channel, settings.frames_per_site)
        except InputError as error:
            skipped.append(f"well {well}, site {site}: {error}")
            continue
        skipped += problems
        if site_planes:
            by_site[(well, site)] = site_planes
    planes = _usable_planes(by_site, skipped)
    if len(planes) < 3:
        raise InputError(
            f"illumination of channel {channel}",
            f"only {len(planes)} usable image(s) to estimate it from"
            + (f"; left out: {'; '.join(skipped[:5])}" if skipped else "")
            + ".",
            "a flat field needs many sites: set illumination.method: none for plates this small.",
        )
    profile = flat_field_from_planes(np.stack(planes), settings.smoothing_sigma_um / pixel_size_um, settings.percentile)
    return profile, len(planes), skipped


def apply_flat_field(planes: np.ndarray, profiles: np.ndarray | None) -> np.ndarray:
    """Divide (channels, y, x) planes by their profiles (channels, y, x); None leaves them as they are."""

    if profiles is None:
        return planes
    if profiles.shape != planes.shape:
        raise InputError(
            "illumination profiles",
            f"profile shape {profiles.shape} differs from the images {planes.shape}.",
            "delete results/illumination and rerun, so the profiles are estimated from these images.",
        )
    return planes / profiles
