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

    SECTION = "exclusion_rules"

    min_cells_per_well: float | None
    min_focus_score: float | None
    max_saturated_fraction: float | None
    min_plate_z_prime: float | None
    z_prime_feature: str


LEDGER_TYPES = {"site": "Int64", "frame": "Int64", "value": "float64", "threshold": "float64"}  # text: str


def typed_ledger(ledger: pd.DataFrame) -> pd.DataFrame:
    """The ledger with one type per column whatever rows it holds (text as str, site and frame as
    nullable integers, value and threshold as floats), so every plate's file has the same schema
    and ``results/exclusions`` opens as one dataset even when some plates excluded nothing."""
    return ledger[LEDGER_COLUMNS].astype({c: LEDGER_TYPES.get(c, "str") for c in LEDGER_COLUMNS})


def empty_ledger() -> pd.DataFrame:
    return typed_ledger(pd.DataFrame({c: pd.Series(dtype="object") for c in LEDGER_COLUMNS}))


@dataclass(frozen=True)
class ExclusionRule:
    """One exclusion rule as data: the config key holding its threshold, the level it acts on, the
    column it reads there, and whether the threshold is a floor ("min") or a ceiling ("max").
    A column ending in ``*`` reads the worst of the matching columns (e.g. every channel)."""

    name: str
    level: str  # site_frame, well or plate
    column: str
    bound: str  # "min": values below the threshold fail; "max": values above it fail

    def values(self, table: pd.DataFrame) -> pd.Series | None:
        """The value the rule compares per row of ``table`` (None when the table has no such column)."""
        if not self.column.endswith("*"):
            return table[self.column] if self.column in table.columns else None
        columns = [c for c in table.columns if c.startswith(self.column[:-1])]
        if not columns:
            return None
        return table[columns].min(axis=1) if self.bound == "min" else table[columns].max(axis=1)

    def fails(self, values: np.ndarray, threshold: float) -> np.ndarray:
        """Rows that fail the rule (a NaN value fails a plate rule: its Z' could not be computed)."""
        values = np.asarray(values, float)
        failing = values < threshold if self.bound == "min" else values > threshold
        return failing | (~np.isfinite(values) if self.level == "plate" else False)


# Every exclusion rule plateloom applies; each threshold is a key of config section exclusion_rules.
EXCLUSION_RULES = (
    ExclusionRule("min_focus_score", "site_frame", "focus_score", "min"),
    ExclusionRule("max_saturated_fraction", "site_frame", "saturated_fraction_*", "max"),
    ExclusionRule("min_cells_per_well", "well", "cell_count", "min"),
    ExclusionRule("min_plate_z_prime", "plate", "z_prime", "min"),
)


def _rules_at(level: str, rules: ExclusionRules) -> list[tuple[ExclusionRule, float]]:
    """The rules of one level that are switched on, with their thresholds."""
    found = []
    for rule in EXCLUSION_RULES:
        threshold = getattr(rules, rule.name)
        if rule.level == level and threshold is not None:
            found.append((rule, float(threshold)))
    return found


def site_frame_exclusions(site_qc: pd.DataFrame, rules: ExclusionRules, plate: str) -> pd.DataFrame:
    """Ledger rows for site-frames failing a site-frame rule (focus floor, saturation ceiling over
    any channel), and for frames that could not be used at all (rule unusable_frame: missing,
    unreadable, wrong shape, NaN pixels)."""
    rows = []
    if "frame_problem" in site_qc.columns:
        bad = site_qc[site_qc["frame_problem"].fillna("") != ""]
        nan = float("nan")
        rows += [
            ("site_frame", plate, r.well, int(r.site), int(r.frame), "unusable_frame", nan, nan)
            for r in bad.itertuples()
        ]
    for rule, threshold in _rules_at("site_frame", rules):
        values = rule.values(site_qc)
        if values is None:
            continue
        failing = rule.fails(values.to_numpy(float), threshold) & values.notna().to_numpy()
        bad = site_qc[failing]
        rows += [
            ("site_frame", plate, r.well, int(r.site), int(r.frame), rule.name, float(v), threshold)
            for r, v in zip(bad.itertuples(), values[failing])
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
    """Mark wells by the well rules in column excluded_by ('' when kept; every failed rule named,
    joined by '; ') and return their ledger rows."""
    out = profile.copy()
    reasons: list[list[str]] = [[] for _ in range(len(out))]
    rows = []
    for rule, threshold in _rules_at("well", rules):
        values = out[rule.column].to_numpy(float)
        for index in np.flatnonzero(rule.fails(values, threshold)):
            comparison = "<" if rule.bound == "min" else ">"
            reasons[index].append(f"{rule.name}: {values[index]:.1f} {comparison} {threshold:g}")
            rows.append(
                (
                    "well",
                    out["plate"].iloc[index],
                    out["well"].iloc[index],
                    -1,
                    -1,
                    rule.name,
                    float(values[index]),
                    threshold,
                )
            )
    out["excluded_by"] = np.array(["; ".join(r) for r in reasons], dtype=object)
    ledger = pd.DataFrame(rows, columns=LEDGER_COLUMNS) if rows else empty_ledger()
    return out, ledger


def plate_exclusion(qc: pd.DataFrame, rules: ExclusionRules, plate: str) -> pd.DataFrame:
    """A ledger row when the plate's Z'-factor on the chosen feature is below the floor (or not computable)."""

    rows = []
    for rule, threshold in _rules_at("plate", rules):
        row = qc[qc["feature"] == rules.z_prime_feature]
        value = float(row[rule.column].iloc[0]) if len(row) else float("nan")
        if rule.fails(np.array([value]), threshold)[0]:
            rows.append(("plate", plate, "", -1, -1, f"{rule.name} ({rules.z_prime_feature})", value, threshold))
    return pd.DataFrame(rows, columns=LEDGER_COLUMNS) if rows else empty_ledger()
