"""Warnings about a screen's design that no statistic can repair, for `plateloom check` and the screen report."""

from __future__ import annotations

import pandas as pd

from plateloom.columns import REFERENCE_ROLE


def treatments_without_plate_controls(wells: pd.DataFrame) -> dict[str, list[str]]:
    """Treatments (role test or positive control) never on a plate that has negative controls,
    with their plates. ``wells``: one row per well with plate, role, treatment."""
    plates_with_controls = set(wells.loc[wells["role"] == REFERENCE_ROLE, "plate"])
    treated = wells[wells["role"].isin(["test", "positive_control"])]
    found = {}
    for treatment, plates in treated.groupby("treatment")["plate"]:
        names = sorted(set(plates))
        if not plates_with_controls.intersection(names):
            found[str(treatment)] = names
    return found


def single_layout(wells: pd.DataFrame) -> bool:
    """True when there are several plates and every one has the same well -> treatment map."""
    maps = {
        plate: frozenset(zip(group["well"].astype(str), group["treatment"].astype(str)))
        for plate, group in wells[wells["role"] != "empty"].groupby("plate")
    }
    return len(maps) > 1 and len(set(maps.values())) == 1


def design_warnings(wells: pd.DataFrame) -> list[str]:
    """Plain-language warnings: treatments without negative controls on their plates, and one
    layout on every plate (position confounded with treatment)."""
    warnings = []
    for treatment, plates in treatments_without_plate_controls(wells).items():
        shown = ", ".join(plates[:5]) + (f" and {len(plates) - 5} more" if len(plates) > 5 else "")
        warnings.append(
            f"treatment {treatment} never shares a plate with negative controls (plates {shown}): its effect "
            "rests on plate-to-plate differences, so its interval has about as many degrees of freedom as it "
            "has plates; put negative controls on its plates where you can, and with few such plates prefer "
            "screen.df_method: kenward_roger (closer to nominal coverage)"
        )
    if single_layout(wells):
        warnings.append(
            "every plate uses the same layout: well position is confounded with treatment, so edge and "
            "gradient effects cannot be told apart from treatment effects; vary the layout between plates "
            "(e.g. rotate it on some plates) or check the positional QC in the plate reports"
        )
    return warnings
