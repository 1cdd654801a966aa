"""Hit calls: Benjamini-Hochberg q-values over the test treatments and a minimum effect size."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from plateloom.stats import bh_qvalues

FDR_FAMILY_ROLE = "test"  # controls are reported with their own p-values, outside the family


@dataclass(frozen=True)
class HitRule:
    """When an effect is a hit: q-value below ``q_value`` and an effect at least ``min_log_ratio``
    (natural-log ratio, log-scale features) or ``min_standardized_effect`` (negative-control well
    SDs, linear-scale features)."""

    q_value: float = 0.05
    min_log_ratio: float = 0.1
    min_standardized_effect: float = 1.0


def add_hit_calls(table: pd.DataFrame, rule: HitRule) -> pd.DataFrame:
    """BH q-values over the (feature, test treatment) pairs with a p-value, and the hit call.

    Positive controls are outside the family (``in_fdr_family`` False, no q-value, never a hit):
    they are expected to move, and counting them would loosen the threshold for test compounds.
    A hit needs q below the rule's q-value and a large enough effect (``HitRule``).
    """
    table = table.copy()
    family = (table["role"] == FDR_FAMILY_ROLE).to_numpy() & np.isfinite(table["p_value"].to_numpy(float))
    q_values = np.full(len(table), np.nan)
    q_values[family] = bh_qvalues(table["p_value"].to_numpy(float)[family])
    table["in_fdr_family"] = family
    table["q_value"] = q_values
    large = np.where(
        table["scale"] == "log",
        table["estimate"].abs() >= rule.min_log_ratio,
        table["standardized_effect"].abs() >= rule.min_standardized_effect,
    )
    table["hit"] = family & (table["q_value"] < rule.q_value) & large
    return table
