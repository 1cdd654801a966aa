"""The plate report's look at the images: thumbnails of segmentation and tracks for a sample of wells.

Every well that site QC flagged is shown (beyond MAX_FLAGGED of them, the others are listed by
name), then an evenly spaced, deterministic sample of the negative controls, positive controls and
test wells in plate order.
"""

from __future__ import annotations

import base64

import pandas as pd

from plateloom.report.html import escape

MAX_FLAGGED = 48  # beyond this many flagged wells, the rest are listed by name
PER_ROLE = {"negative_control": 3, "positive_control": 3, "test": 6}
THUMBNAIL_TEXT = (
    "<p>One site per well, on its first frame flagged by site QC (else its last usable frame): the nuclear "
    "channel on a log scale, nuclear outlines in cyan, and in yellow each track's path over the previous "
    "frames. Every flagged well is shown, then a fixed sample of control and test wells.</p>"
)


def _evenly_spaced(wells: list[str], count: int) -> list[str]:
    if len(wells) <= count:
        return wells
    step = (len(wells) - 1) / (count - 1) if count > 1 else 0
    return [wells[round(i * step)] for i in range(count)]


def choose_thumbnail_wells(profile: pd.DataFrame, flagged: dict[str, list[str]], available: set[str]) -> list[str]:
    """Wells to show: the flagged ones (sorted, at most MAX_FLAGGED), then a sample per role."""
    chosen = [w for w in sorted(flagged) if w in available][:MAX_FLAGGED]
    for role, count in PER_ROLE.items():
        of_role = [w for w in profile.loc[profile["role"] == role, "well"] if w in available and w not in chosen]
        chosen += _evenly_spaced(of_role, count)
    return chosen


def thumbnails_html(
    profile: pd.DataFrame, thumbnails: dict[str, bytes] | None, flagged: dict[str, list[str]] | None
) -> str:
    """The report section: a grid of captioned thumbnails (or a sentence saying there are none)."""
    if not thumbnails:
        return "<p>No thumbnails were written for this plate.</p>"
    flagged = flagged or {}
    about = profile.set_index("well")
    cells = []
    for well in choose_thumbnail_wells(profile, flagged, set(thumbnails)):
        encoded = base64.b64encode(thumbnails[well]).decode("ascii")
        role = about["role"].get(well, "") if "role" in about else ""
        condition = about["condition"].get(well, "") if "condition" in about else ""
        flags = "".join(f'<br><span class="caution">{escape(f)}</span>' for f in flagged.get(well, []))
        cells.append(
            f'<figure class="thumb"><img src="data:image/png;base64,{encoded}" alt="well {escape(well)}">'
            f"<figcaption><b>{escape(well)}</b> {escape(role)} {escape(condition)}{flags}</figcaption></figure>"
        )
    unshown = [w for w in sorted(flagged) if w in thumbnails][MAX_FLAGGED:]
    more = (
        f'<p class="caution">{len(unshown)} more flagged well(s) not shown: {escape(", ".join(unshown))}.</p>'
        if unshown
        else ""
    )
    return THUMBNAIL_TEXT + '<div class="thumbs">' + "".join(cells) + "</div>" + more
