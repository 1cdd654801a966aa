"""The plate fan-in as one pure function: well profiles, exclusions, correction, normalization, QC."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from plateloom.columns import well_features
from plateloom.plate.exclusions import (
    ExclusionRules,
    drop_excluded_site_frames,
    excluded_site_frames,
    plate_exclusion,
    site_frame_exclusions,
    typed_ledger,
    well_exclusions,
)
from plateloom.plate.fate import well_fate
from plateloom.plate.normalization import NORMALIZATIONS, normalize
from plateloom.plate.positional import correct_positions
from plateloom.plate.qc import plate_qc
from plateloom.plate.streamed_summaries import summarise_observation_files
from plateloom.plate.summaries import (
    observation_counts,
    observation_summaries,
    summarise_wells,
)
from plateloom.plate.time_courses import (
    TimeWindows,
    drift_notes,
    observation_windows,
    time_course_table,
    window_cell_counts,
)
from plateloom.settings import FromSchema
from plateloom.stats import MAD_TO_SD, mad
from plateloom.well.image_qc import jumped_frames


@dataclass(frozen=True)
class PlateSettings(FromSchema):
    """Plate-stage choices from config."""

    SECTION = "plate"

    normalization: str
    normalization_by_feature: dict[str, str]
    positional_correction: str
    well_summary: str


@dataclass
class PlateTables:
    profile: pd.DataFrame
    qc: pd.DataFrame
    ledger: pd.DataFrame
    edge: pd.DataFrame
    warnings: list[str]
    site_summary: dict[str, float]
    time_course: pd.DataFrame | None = None


def summarise_site_qc(site_qc: pd.DataFrame) -> dict[str, float]:
    """Plate-level image QC: site-frames, empty fields, focus score spread, worst saturation."""
    saturation = [c for c in site_qc.columns if c.startswith("saturated_fraction_")]
    unusable = int((site_qc["frame_problem"].fillna("") != "").sum()) if "frame_problem" in site_qc.columns else 0
    return {
        "site_frames": int(len(site_qc)),
        "empty_site_frames": int((site_qc["n_objects"] == 0).sum()) - unusable,
        "unusable_site_frames": unusable,
        "focus_score_median": float(site_qc["focus_score"].median()),
        "focus_score_min": float(site_qc["focus_score"].min()),
        "saturated_fraction_max": float(np.nanmax(site_qc[saturation].to_numpy()))
        if saturation and site_qc[saturation].notna().any().any()
        else float("nan"),
    }


def unusable_frame_notes(site_qc: pd.DataFrame, shown: int = 5) -> list[str]:
    """Plate-report warnings for frames that could not be used (each with its message and fix)."""
    if "frame_problem" not in site_qc.columns:
        return []
    problems = site_qc["frame_problem"].fillna("")
    problems = problems[problems != ""].tolist()
    if not problems:
        return []
    more = f" ({len(problems) - shown} more in the site QC table)" if len(problems) > shown else ""
    return [
        f"{len(problems)} site-frame(s) could not be used and are in the exclusion ledger as unusable_frame; "
        f"the rest of their wells was analysed{more}."
    ] + problems[:shown]


def segmentation_jump_notes(site_qc: pd.DataFrame, shown: int = 5) -> list[str]:
    """Plate-report warnings for site-frames whose threshold jumped from the previous frame, or whose
    object count spiked or dipped against both neighbouring frames (the segmentation changed, not
    the cells)."""
    jumped = jumped_frames(site_qc)
    if jumped.empty:
        return []
    sites = jumped.groupby(["well", "site"])["frame"].apply(lambda f: ", ".join(str(int(x)) for x in f))
    listed = "; ".join(f"well {w} site {s}: frames {frames}" for (w, s), frames in list(sites.items())[:shown])
    more = f" (and {len(sites) - shown} more sites)" if len(sites) > shown else ""
    return [
        f"segmentation jumped between frames at {len(jumped)} site-frame(s): the foreground threshold "
        "changed by more than 1.3x from the frame before, or the object count spiked or dipped by more than "
        f"1.5x against both neighbouring frames ({listed}{more}); counts and growth rates of these sites are "
        "suspect: look at the images (a threshold captured by a few very bright objects, a focus or "
        "illumination change)"
    ]


NEAR_CUTOFF_SHARE = 0.05  # a site with more links than this near the linking cutoff ...
CUT_OFF_SHARE = 0.02  # ... or more forbidden links than this share of its links: the cutoff binds


def binding_sites(site_qc: pd.DataFrame) -> pd.DataFrame:
    """Per (well, site) link counts of the sites where the linking distance binds (empty if none)."""
    needed = ["links", "links_near_cutoff", "links_cut_off"]
    if not set(needed) <= set(site_qc.columns):
        return pd.DataFrame(columns=needed)
    per_site = site_qc.groupby(["well", "site"])[needed + ["linking_distance_um"]].agg(
        {"links": "sum", "links_near_cutoff": "sum", "links_cut_off": "sum", "linking_distance_um": "max"}
    )
    links = per_site["links"].clip(lower=1)
    near, cut = per_site["links_near_cutoff"] / links, per_site["links_cut_off"] / links
    return per_site[(near > NEAR_CUTOFF_SHARE) | (cut > CUT_OFF_SHARE)]


def well_flags(site_qc: pd.DataFrame) -> dict[str, list[str]]:
    """Short site-QC flags per well (wells without a flag left out), for the plate report's thumbnails."""
    flags: dict[str, list[str]] = {}
    for (well, site), frames in jumped_frames(site_qc).groupby(["well", "site"])["frame"]:
        flags.setdefault(well, []).append(f"site {site}: segmentation jump at frame(s) {', '.join(map(str, frames))}")
    for well, site in binding_sites(site_qc).index:
        flags.setdefault(well, []).append(f"site {site}: linking distance binds")
    if "frame_problem" in site_qc.columns:
        unusable = site_qc[site_qc["frame_problem"].fillna("") != ""]
        for (well, site), frames in unusable.groupby(["well", "site"])["frame"]:
            flags.setdefault(well, []).append(f"site {site}: {len(frames)} unusable frame(s)")
    return {well: flags[well] for well in sorted(flags)}


def linking_notes(site_qc: pd.DataFrame, shown: int = 5) -> list[str]:
    """Plate-report warnings for sites where the linking distance binds: many links close to it, or
    plausible links it forbade (tracks broken, speeds biased low)."""
    binding = binding_sites(site_qc)
    if binding.empty:
        return []
    near = binding["links_near_cutoff"] / binding["links"].clip(lower=1)
    listed = "; ".join(
        f"well {w} site {s}: {near[(w, s)]:.0%} of links near the {row.linking_distance_um:.3g} um cutoff, "
        f"{int(row.links_cut_off)} links cut off"
        for (w, s), row in list(binding.iterrows())[:shown]
    )
    more = f" (and {len(binding) - shown} more sites)" if len(binding) > shown else ""
    return [
        f"the linking distance binds at {len(binding)} site(s) ({listed}{more}): tracks break and speeds "
        "read low; raise tracking.max_displacement_um, or set it to null to estimate it from the data"
    ]


@dataclass(frozen=True)
class PlateDesign:
    """Which plate: its id, batch (imaging day), format (number of wells) and layout."""

    plate: str
    batch: str
    wells: int
    layout: pd.DataFrame


@dataclass(frozen=True)
class WellTables:
    """The per-well stage's tables of one plate other than the cells: tracks, site QC and, if
    computed, the collective readouts (one row per well)."""

    tracks: pd.DataFrame
    site_qc: pd.DataFrame
    collective: pd.DataFrame | None = None


def build_plate_tables(
    cells: pd.DataFrame,
    tables: WellTables,
    design: PlateDesign,
    settings: PlateSettings,
    rules: ExclusionRules,
    windows: TimeWindows | None = None,
) -> PlateTables:
    """Everything the plate stage writes, from the per-well tables of one plate held in memory.

    The collective readouts, if given, join the well profiles as features; with ``windows`` the
    well time courses are made too. ``build_plate_tables_from_files`` (what the rule runs) gives
    the same tables without holding the cells table.
    """
    excluded = site_frame_exclusions(tables.site_qc, rules, design.plate)
    kept = drop_excluded_site_frames(cells, excluded)
    summaries = observation_summaries(kept, settings.well_summary)
    window_values = observation_windows(kept, list(summaries.columns), windows) if windows else None
    observed = _Observed(observation_counts(cells), summaries, excluded, window_values)
    return _plate_tables(observed, tables, design, settings, rules, windows)


def build_plate_tables_from_files(
    cell_folders: list[str],
    tables: WellTables,
    design: PlateDesign,
    settings: PlateSettings,
    rules: ExclusionRules,
    threads: int = 1,
    windows: TimeWindows | None = None,
) -> PlateTables:
    """``build_plate_tables`` reading the cells tables well folder by well folder on ``threads``
    threads: the observation features are summarised per well as each folder is read
    (``summarise_observation_files``) and only the observation counts per site and frame are held
    for the whole plate. Same tables."""
    excluded = site_frame_exclusions(tables.site_qc, rules, design.plate)
    window = (windows.window_min, windows.origin_min) if windows else None
    streamed = summarise_observation_files(
        cell_folders, excluded_site_frames(excluded), settings.well_summary, threads, window
    )
    observed = _Observed(streamed.counts, streamed.summaries, excluded, streamed.windows)
    return _plate_tables(observed, tables, design, settings, rules, windows)


@dataclass(frozen=True)
class _Observed:
    """Observation counts per well, site and frame (all observations), per-well feature summaries
    of the kept observations, and the site-frame exclusions."""

    counts: pd.DataFrame
    summaries: pd.DataFrame
    site_frame_ledger: pd.DataFrame
    windows: pd.DataFrame | None = None  # per (well, time window) medians, when asked for


def _well_profile(observed: _Observed, tables: WellTables, design: PlateDesign, statistic: str) -> pd.DataFrame:
    """Well profiles with the collective readouts, the fate rates and the share of observations used."""
    kept_counts = drop_excluded_site_frames(observed.counts, observed.site_frame_ledger)
    d = design
    profile = summarise_wells(
        kept_counts, observed.summaries, tables.tracks, d.layout, d.plate, d.batch, d.wells, statistic
    )
    collective = tables.collective
    if collective is not None and len(collective.columns.difference(["plate", "well"])):
        readouts = collective.drop(columns=["plate"], errors="ignore").assign(well=lambda t: t["well"].astype(str))
        profile = profile.merge(readouts, on="well", how="left", validate="one_to_one")
    fate = well_fate(observed.counts, tables.tracks)
    if len(fate.columns):
        profile = profile.merge(fate.reset_index(), on="well", how="left", validate="one_to_one")
        for column in ("n_divisions", "n_deaths"):  # 0 for a well with no usable frame, int on every plate
            profile[column] = profile[column].fillna(0).astype(np.int64)
        profile["cell_hours"] = profile["cell_hours"].fillna(0.0)
    measured = observed.counts.groupby("well", observed=True)["observations"].sum()
    used = kept_counts.groupby("well", observed=True)["whole"].sum()
    measured.index, used.index = measured.index.astype(str), used.index.astype(str)
    wells = profile["well"]
    profile["fraction_observations_used"] = used.reindex(wells).fillna(0).to_numpy() / measured.reindex(wells).to_numpy(
        float
    )
    return profile


def _design_warnings(profile: pd.DataFrame, kept: np.ndarray) -> list[str]:
    warnings = []
    roles = profile["role"].to_numpy()
    for treatment, count in profile.loc[kept & (roles != "negative_control"), "treatment"].value_counts().items():
        if count == 1:
            warnings.append(f"treatment {treatment!r} has a single kept well on this plate")
    if not ((roles == "negative_control") & kept).any():
        warnings.append("no negative-control well passed the exclusion rules: normalized values are NaN")
    return warnings


def _normalize_features(profile: pd.DataFrame, features: list[str], kept: np.ndarray, settings: PlateSettings) -> None:
    """Add each feature's normalized column (by its method in ``settings``) to ``profile``."""
    negative = profile[(profile["role"] == "negative_control") & kept]
    positive = profile[(profile["role"] == "positive_control") & kept]
    for feature in features:
        method = settings.normalization_by_feature.get(feature, settings.normalization)
        normalized = normalize(profile[feature], negative[feature], positive[feature], method)
        if normalized is not None:
            profile[feature + NORMALIZATIONS[method].suffix] = normalized


def _cell_count_outliers(profile: pd.DataFrame, kept: np.ndarray) -> np.ndarray:
    """Wells whose cell count lies over 3.5 robust SDs from the kept wells' median."""
    counts = profile.loc[kept, "cell_count"].to_numpy(float)
    if len(counts) < 5 or not mad(counts) > 0:
        return np.zeros(len(profile), bool)
    z = (profile["cell_count"].to_numpy(float) - np.median(counts)) / (MAD_TO_SD * mad(counts))
    return np.abs(z) > 3.5


def _time_course(observed: _Observed, profile: pd.DataFrame, windows: TimeWindows) -> tuple[pd.DataFrame, list[str]]:
    """The plate's time-course table and the warnings about its negative controls' drift."""
    kept_counts = drop_excluded_site_frames(observed.counts, observed.site_frame_ledger)
    cell_counts = window_cell_counts(kept_counts, windows.window_min, windows.origin_min)
    table = time_course_table(observed.windows, cell_counts, profile, windows.window_min, windows.origin_name)
    return table, drift_notes(table, list(observed.summaries.columns), windows)


def _plate_tables(
    observed: _Observed,
    tables: WellTables,
    design: PlateDesign,
    settings: PlateSettings,
    rules: ExclusionRules,
    windows: TimeWindows | None = None,
) -> PlateTables:
    """The plate tables from what the well folders held (see ``_Observed``)."""

    warnings = (
        unusable_frame_notes(tables.site_qc) + segmentation_jump_notes(tables.site_qc) + linking_notes(tables.site_qc)
    )
    profile, well_ledger = well_exclusions(_well_profile(observed, tables, design, settings.well_summary), rules)
    features = well_features(list(profile.columns))
    kept = (profile["excluded_by"] == "").to_numpy()
    warnings += _design_warnings(profile, kept)
    edge_rows, position_notes = correct_positions(profile, features, kept, design.wells, settings.positional_correction)
    warnings += [f"positional correction: {note}" for note in sorted(position_notes)]
    _normalize_features(profile, features, kept, settings)
    profile["cell_count_outlier"] = _cell_count_outliers(profile, kept)
    qc = plate_qc(profile, features)
    ledger = [observed.site_frame_ledger, well_ledger, plate_exclusion(qc, rules, design.plate)]
    frames = [table for table in ledger if not table.empty]
    ledger_table = typed_ledger(pd.concat(frames, ignore_index=True) if frames else ledger[0])
    plate_rows = ledger_table[ledger_table["level"] == "plate"]
    profile["plate_excluded_by"] = (
        (f"{plate_rows['rule'].iloc[0]}: {plate_rows['value'].iloc[0]:.3g} < {plate_rows['threshold'].iloc[0]:g}")
        if len(plate_rows)
        else ""
    )
    edge = pd.DataFrame(edge_rows)
    for table in (qc, edge):  # the plate in every file, not only in its folder name
        table.insert(0, "plate", design.plate)
    time_course = None
    if windows is not None and observed.windows is not None:
        time_course, notes = _time_course(observed, profile, windows)
        warnings += notes
    return PlateTables(profile, qc, ledger_table, edge, warnings, summarise_site_qc(tables.site_qc), time_course)
