"""Exclusion rules declared in config, applied to every plate alike, and the exclusion ledger.

Every site-frame, well or plate left out of the screen model gets a ledger row: the level,
where it is, the rule, the measured value and the threshold. Nothing is left out that is not
in the ledger.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from plateloom.settings import FromSchema

LEDGER_COLUMNS = ["level", "plate", "well", "site", "frame", "rule", "value", "threshold"]


@dataclass(frozen=True)
class ExclusionRules(FromSchema):
    """Thresholds of the rules; None switches a rule off."""

    min_cells_per_well: float | None
    min_focus_score: float | None
    max_saturated_fraction: float | None
    min_plate_z_prime: float | None
    z_prime_feature: str

    @classmethod
    def from_config(cls, config: dict) -> ExclusionRules:
        """From the validated config's ``exclusion_rules`` section (every key filled by the schema)."""
        return cls(**config["exclusion_rules"])


def empty_ledger() -> pd.DataFrame:
    return pd.DataFrame(
        {
            c: pd.Series(
                dtype="int64" if c in ("site", "frame") else "float64" if c in ("value", "threshold") else "object"
            )
            for c in LEDGER_COLUMNS
        }
    )


def site_frame_exclusions(site_qc: pd.DataFrame, rules: ExclusionRules, plate: str) -> pd.DataFrame:
    """Ledger rows for site-frames failing the focus floor or the saturation ceiling (any channel), and for
    frames that could not be used at all (rule unusable_frame: missing, unreadable, wrong shape, NaN pixels)."""
    rows = []
    if "frame_problem" in site_qc.columns:
        bad = site_qc[site_qc["frame_problem"].fillna("") != ""]
        rows += [
            ("site_frame", plate, r.well, int(r.site), int(r.frame), "unusable_frame", float("nan"), float("nan"))
            for r in bad.itertuples()
        ]
    if rules.min_focus_score is not None:
        bad = site_qc[site_qc["focus_score"] < rules.min_focus_score]
        rows += [
            (
                "site_frame",
                plate,
                r.well,
                int(r.site),
                int(r.frame),
                "min_focus_score",
                float(r.focus_score),
                rules.min_focus_score,
            )
            for r in bad.itertuples()
        ]
    if rules.max_saturated_fraction is not None:
        columns = [c for c in site_qc.columns if c.startswith("saturated_fraction_")]
        if columns:
            worst = site_qc[columns].max(axis=1)
            bad = site_qc[worst > rules.max_saturated_fraction]
            rows += [
                (
                    "site_frame",
                    plate,
                    r.well,
                    int(r.site),
                    int(r.frame),
                    "max_saturated_fraction",
                    float(w),
                    rules.max_saturated_fraction,
                )
                for r, w in zip(bad.itertuples(), worst[bad.index])
            ]
    return pd.DataFrame(rows, columns=LEDGER_COLUMNS) if rows else empty_ledger()


def excluded_site_frames(ledger: pd.DataFrame) -> pd.DataFrame:
    """The (well, site, frame) of every site-frame the ledger excludes, once each."""
    return ledger[ledger["level"] == "site_frame"][["well", "site", "frame"]].drop_duplicates()


def drop_excluded_site_frames(cells: pd.DataFrame, ledger: pd.DataFrame) -> pd.DataFrame:
    """Observations not in an excluded site-frame of the ledger."""
    excluded = excluded_site_frames(ledger)
    if excluded.empty:
        return cells
    keys = pd.MultiIndex.from_arrays([cells["well"].astype(str), cells["site"], cells["frame"]])
    dropped = keys.isin(pd.MultiIndex.from_frame(excluded.astype({"well": str})))
    return cells[~dropped]


def well_exclusions(profile: pd.DataFrame, rules: ExclusionRules) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Mark wells by the well rules in column excluded_by ('' when kept) and return their ledger rows."""
    out = profile.copy()
    reasons = np.full(len(out), "", dtype=object)
    rows = []
    if rules.min_cells_per_well is not None:
        low = out["cell_count"].to_numpy(float) < rules.min_cells_per_well
        for index in np.flatnonzero(low):
            value = float(out["cell_count"].iloc[index])
            reasons[index] = f"min_cells_per_well: {value:.1f} < {rules.min_cells_per_well:g}"
            rows.append(
                (
                    "well",
                    out["plate"].iloc[index],
                    out["well"].iloc[index],
                    -1,
                    -1,
                    "min_cells_per_well",
                    value,
                    float(rules.min_cells_per_well),
                )
            )
    out["excluded_by"] = reasons
    ledger = pd.DataFrame(rows, columns=LEDGER_COLUMNS) if rows else empty_ledger()
    return out, ledger


def plate_exclusion(qc: pd.DataFrame, rules: ExclusionRules, plate: str) -> pd.DataFrame:
    """A ledger row when the plate's Z'-factor on the chosen feature is below the floor (or not computable)."""
    if rules.min_plate_z_prime is None:
        return empty_ledger()
    row = qc[qc["feature"] == rules.z_prime_feature]
    value = float(row["z_prime"].iloc[0]) if len(row) else float("nan")
    if np.isfinite(value) and value >= rules.min_plate_z_prime:
        return empty_ledger()
    return pd.DataFrame(
        [
            (
                "plate",
                plate,
                "",
                -1,
                -1,
                f"min_plate_z_prime ({rules.z_prime_feature})",
                value,
                float(rules.min_plate_z_prime),
            )
        ],
        columns=LEDGER_COLUMNS,
    )
