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
    well_exclusions,
)
from plateloom.plate.normalization import NORMALIZATIONS, normalize
from plateloom.plate.positional import b_scores, edge_effect, positional_correction
from plateloom.plate.qc import plate_qc
from plateloom.plate.summaries import (
    observation_counts,
    observation_summaries,
    summarise_observation_files,
    summarise_wells,
)
from plateloom.settings import FromSchema
from plateloom.setup.plate_formats import plate_format, well_grid
from plateloom.stats import MAD_TO_SD, mad


@dataclass(frozen=True)
class PlateSettings(FromSchema):
    """Plate-stage choices from config."""

    normalization: str
    normalization_by_feature: dict[str, str]
    positional_correction: str
    well_summary: str

    @classmethod
    def from_config(cls, config: dict) -> PlateSettings:
        """From the validated config's ``plate`` section (every key filled by the schema)."""
        return cls(**{k: v for k, v in config["plate"].items() if k != "report_feature"})


@dataclass
class PlateTables:
    profile: pd.DataFrame
    qc: pd.DataFrame
    ledger: pd.DataFrame
    edge: pd.DataFrame
    warnings: list[str]
    site_summary: dict[str, float]


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


def _grid_values(profile: pd.DataFrame, values: np.ndarray, fmt) -> np.ndarray:
    return well_grid(dict(zip(profile["well"], values)), fmt)


def _from_grid(profile: pd.DataFrame, grid: np.ndarray) -> np.ndarray:
    return grid[profile["row"].to_numpy() - 1, profile["column"].to_numpy() - 1]


def build_plate_tables(
    cells: pd.DataFrame,
    tracks: pd.DataFrame,
    site_qc: pd.DataFrame,
    layout: pd.DataFrame,
    plate: str,
    batch: str,
    wells: int,
    settings: PlateSettings,
    rules: ExclusionRules,
    collective: pd.DataFrame | None = None,
) -> PlateTables:
    """Everything the plate stage writes, from the per-well tables of one plate held in memory.

    ``collective`` (one row per well: plate, well and collective readouts), if given, adds its
    readouts to the well profiles as features. ``build_plate_tables_from_files`` (what the rule
    runs, on ``threads`` threads) gives the same tables without holding the cells table.
    """
    excluded = site_frame_exclusions(site_qc, rules, plate)
    summaries = observation_summaries(drop_excluded_site_frames(cells, excluded), settings.well_summary)
    return _plate_tables(
        observation_counts(cells),
        summaries,
        excluded,
        tracks,
        site_qc,
        layout,
        plate,
        batch,
        wells,
        settings,
        rules,
        collective,
    )


def build_plate_tables_from_files(
    cell_folders: list[str],
    tracks: pd.DataFrame,
    site_qc: pd.DataFrame,
    layout: pd.DataFrame,
    plate: str,
    batch: str,
    wells: int,
    settings: PlateSettings,
    rules: ExclusionRules,
    collective: pd.DataFrame | None = None,
    threads: int = 1,
) -> PlateTables:
    """``build_plate_tables`` reading the cells tables well folder by well folder: the observation
    features are summarised per well as each folder is read (``summarise_observation_files``) and
    only the observation counts per site and frame are held for the whole plate. Same tables."""
    excluded = site_frame_exclusions(site_qc, rules, plate)
    summaries, counts = summarise_observation_files(
        cell_folders, excluded_site_frames(excluded), settings.well_summary, threads
    )
    return _plate_tables(
        counts, summaries, excluded, tracks, site_qc, layout, plate, batch, wells, settings, rules, collective
    )


def _plate_tables(
    counts: pd.DataFrame,
    summaries: pd.DataFrame,
    site_frame_ledger: pd.DataFrame,
    tracks: pd.DataFrame,
    site_qc: pd.DataFrame,
    layout: pd.DataFrame,
    plate: str,
    batch: str,
    wells: int,
    settings: PlateSettings,
    rules: ExclusionRules,
    collective: pd.DataFrame | None,
) -> PlateTables:
    """The plate tables from the observation counts (all observations), the per-well feature
    summaries of the observations kept, and the site-frame exclusions."""
    fmt = plate_format(wells)
    warnings: list[str] = []
    ledger = [site_frame_ledger]
    warnings += unusable_frame_notes(site_qc)
    kept_counts = drop_excluded_site_frames(counts, ledger[0])
    profile = summarise_wells(kept_counts, summaries, tracks, layout, plate, batch, wells, settings.well_summary)
    if collective is not None and len(collective.columns.difference(["plate", "well"])):
        readouts = collective.drop(columns=["plate"], errors="ignore").assign(well=lambda t: t["well"].astype(str))
        profile = profile.merge(readouts, on="well", how="left", validate="one_to_one")
    measured = counts.groupby("well", observed=True)["observations"].sum()
    used = kept_counts.groupby("well", observed=True)["whole"].sum()
    measured.index, used.index = measured.index.astype(str), used.index.astype(str)
    profile["fraction_observations_used"] = used.reindex(profile["well"]).fillna(0).to_numpy() / measured.reindex(
        profile["well"]
    ).to_numpy(float)
    profile, well_ledger = well_exclusions(profile, rules)
    ledger.append(well_ledger)
    features = well_features(list(profile.columns))
    kept = (profile["excluded_by"] == "").to_numpy()
    roles = profile["role"].to_numpy()
    for treatment, count in profile.loc[kept & (roles != "negative_control"), "treatment"].value_counts().items():
        if count == 1:
            warnings.append(f"treatment {treatment!r} has a single kept well on this plate")
    if not ((roles == "negative_control") & kept).any():
        warnings.append("no negative-control well passed the exclusion rules: normalized values are NaN")
    edge_rows = []
    position_notes: set[str] = set()
    for feature in features:
        values = profile[feature].to_numpy(float)
        log_scale = bool(np.all(values[np.isfinite(values)] > 0))
        edge_rows.append(edge_effect(profile, feature, log_scale) | {"scale": "log" if log_scale else "linear"})
        if settings.positional_correction == "median_polish":
            scaled = np.log(values) if log_scale else values
            grid = _grid_values(profile, np.where(kept, scaled, np.nan), fmt)
            centred = (
                pd.Series(np.where(kept, scaled, np.nan)).groupby(profile["treatment"].to_numpy()).transform("median")
            )
            fit_grid = _grid_values(profile, np.where(kept, scaled - centred.to_numpy(), np.nan), fmt)
            corrected, notes = positional_correction(grid, fit_grid)
            position_notes.update(notes)
            corrected_values = _from_grid(profile, corrected)
            corrected_values = np.where(kept, corrected_values, scaled)
            profile[f"{feature}_uncorrected"] = values
            profile[feature] = np.exp(corrected_values) if log_scale else corrected_values
            profile[f"{feature}_b_score"] = _from_grid(profile, b_scores(grid))
            after = edge_effect(profile, feature, log_scale)
            edge_rows[-1] |= {"edge_shift_corrected": after["edge_shift"], "p_value_corrected": after["p_value"]}
    warnings += [f"positional correction: {note}" for note in sorted(position_notes)]
    negative = profile[(profile["role"] == "negative_control") & kept]
    positive = profile[(profile["role"] == "positive_control") & kept]
    for feature in features:
        method = settings.normalization_by_feature.get(feature, settings.normalization)
        normalized = normalize(profile[feature], negative[feature], positive[feature], method)
        if normalized is not None:
            profile[feature + NORMALIZATIONS[method].suffix] = normalized
    counts = profile.loc[kept, "cell_count"].to_numpy(float)
    if len(counts) >= 5 and mad(counts) > 0:
        z = (profile["cell_count"].to_numpy(float) - np.median(counts)) / (MAD_TO_SD * mad(counts))
        profile["cell_count_outlier"] = np.abs(z) > 3.5
    else:
        profile["cell_count_outlier"] = False
    qc = plate_qc(profile, features)
    ledger.append(plate_exclusion(qc, rules, plate))
    frames = [table for table in ledger if not table.empty]
    ledger_table = pd.concat(frames, ignore_index=True) if frames else ledger[0]
    plate_rows = ledger_table[ledger_table["level"] == "plate"]
    profile["plate_excluded_by"] = (
        (f"{plate_rows['rule'].iloc[0]}: {plate_rows['value'].iloc[0]:.3g} < {plate_rows['threshold'].iloc[0]:g}")
        if len(plate_rows)
        else ""
    )
    return PlateTables(profile, qc, ledger_table, pd.DataFrame(edge_rows), warnings, summarise_site_qc(site_qc))
