"""The one registry of table columns: name, tables, unit, kind, how a well summarises it, scale.

Every stage asks this registry what a column is (a key, a flag, a design column, a count, or
a measure, and whether and how it becomes a well feature) instead of keeping a list of its
own. A name with ``{channel}`` stands for one column per channel (``mean_intensity_nuclear``).

Adding a per-observation feature: one ``Column`` entry here (summary "observations") and the
function that computes it (``plateloom.well.features``); the plate stage summarises it per
well and the screen stage can model it by name.
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from functools import lru_cache

ROLES = ("negative_control", "positive_control", "test", "empty")
REFERENCE_ROLE = "negative_control"
ANALYSED_ROLES = ("negative_control", "positive_control", "test")

KINDS = ("key", "position", "flag", "design", "count", "statistic", "measure")
SUMMARIES = ("observations", "tracks", "well")  # per-observation, per-track, or computed per well


@dataclass(frozen=True)
class Column:
    """One column (or one per channel) of plateloom's tables."""

    name: str  # exact, or with {channel}
    tables: tuple[str, ...]
    kind: str  # one of KINDS
    unit: str = ""  # "" for unitless
    summary: str | None = None  # one of SUMMARIES: a well feature; None: not summarised per well
    scale: str = "linear"  # "log": strictly positive, modelled on the log scale by default
    description: str = ""

    def __post_init__(self) -> None:
        if self.kind not in KINDS or self.summary not in (*SUMMARIES, None) or self.scale not in ("linear", "log"):
            raise ValueError(f"column {self.name}: kind, summary or scale not one of the registry's words")


_C = ("cells",)
_T = ("tracks",)
_W = ("wells",)
_CW = ("cells", "wells")
_TW = ("tracks", "wells")

REGISTRY: tuple[Column, ...] = (
    # keys: every table carries those it needs to join
    Column("plate", ("cells", "tracks", "site_qc", "collective", "wells", "exclusions", "events"), "key"),
    Column("well", ("cells", "tracks", "site_qc", "collective", "wells", "exclusions", "events"), "key"),
    Column("site", ("cells", "tracks", "site_qc", "exclusions", "events"), "key"),
    Column("frame", ("cells", "site_qc", "exclusions", "events"), "key"),
    Column("time_min", ("cells", "events"), "key", "min", description="time since the first frame"),
    Column("object", _C, "key", description="label of the object in its frame"),
    Column("track", ("cells", "tracks", "events"), "key"),
    Column("parent_track", ("cells", "tracks"), "key", description="the track this one divided from"),
    Column(
        "chunk",
        (),
        "key",
        description="folder of a per-well job's outputs (chunk-C: not a Hive key, so no reader adds it as a column)",
    ),
    Column("centroid_x_um", _C, "position", "um"),
    Column("centroid_y_um", _C, "position", "um"),
    Column("touches_border", ("cells", "tracks"), "flag", description="left out of the well summaries"),
    Column("edge_distance_um", _C, "position", "um", description="centroid to the nearest edge of the field"),
    # well design (from the screen sheet and layout)
    Column("batch", _W, "design"),
    Column("row", _W, "design"),
    Column("column", _W, "design"),
    Column("is_edge", _W, "design"),
    Column("role", _W, "design"),
    Column("condition", _W, "design"),
    Column("dose", _W, "design"),
    Column("dose_unit", _W, "design"),
    Column("treatment", _W, "design"),
    # per-observation features (summarised per well over observations not touching the border)
    Column("area_um2", _CW, "measure", "um2", "observations", "log"),
    Column("perimeter_um", _CW, "measure", "um", "observations", "log"),
    Column("eccentricity", _CW, "measure", "", "observations"),
    Column("solidity", _CW, "measure", "", "observations"),
    Column("major_axis_um", _CW, "measure", "um", "observations", "log"),
    Column("minor_axis_um", _CW, "measure", "um", "observations", "log"),
    Column("isoperimetric_quotient", _CW, "measure", "", "observations", description="4 pi area / perimeter^2"),
    Column("mean_intensity_{channel}", _CW, "measure", "grey level", "observations", "log"),
    Column("integrated_intensity_{channel}", _CW, "measure", "grey level x px", "observations", "log"),
    Column("std_intensity_{channel}", _CW, "measure", "grey level", "observations"),
    Column(
        "saturated_fraction_{channel}", _C, "flag", description="share of the object's pixels at the camera's ceiling"
    ),
    Column("glcm_contrast_{channel}", _CW, "measure", "", "observations"),
    Column("glcm_homogeneity_{channel}", _CW, "measure", "", "observations"),
    Column("glcm_correlation_{channel}", _CW, "measure", "", "observations"),
    Column("glcm_asm_{channel}", _CW, "measure", "", "observations"),
    Column("neighbours", _CW, "measure", "", "observations"),
    Column("nearest_neighbour_um", _CW, "measure", "um", "observations"),
    Column("cell_area_um2", _CW, "measure", "um2", "observations", "log"),
    Column("cytoplasm_area_um2", _CW, "measure", "um2", "observations"),
    Column("cytoplasm_mean_intensity_{channel}", _CW, "measure", "grey level", "observations"),
    Column("nuclear_cytoplasmic_ratio_{channel}", _CW, "measure", "", "observations"),
    # per-track measures; those with a summary are summarised per well over tracks
    Column("n_frames", ("tracks", "wells"), "count", description="frames of a track; frames imaged in a well"),
    Column("duration_min", _T, "measure", "min"),
    Column("start_min", _T, "key", "min", description="time of the track's first frame (a daughter's birth)"),
    Column("end_min", _T, "key", "min", description="time of the track's last frame"),
    Column("path_length_um", _T, "measure", "um"),
    Column("net_displacement_um", _T, "measure", "um"),
    Column("speed_um_per_min", _TW, "measure", "um/min", "tracks", "log"),
    Column("straightness", _TW, "measure", "", "tracks"),
    Column("walk_speed_um_per_min", _TW, "measure", "um/min", "tracks"),
    Column("persistence_time_min", _TW, "measure", "min", "tracks"),
    Column("track_mean_{channel}", _TW, "measure", "grey level", "tracks"),
    Column("track_cv_{channel}", _TW, "measure", "", "tracks"),
    Column("period_min_{channel}", _TW, "measure", "min", "tracks"),
    Column("peaks_per_h_{channel}", _TW, "measure", "1/h", "tracks"),
    Column("max_rate_per_min_{channel}", _TW, "measure", "1/min", "tracks"),
    Column(
        "end_event", _T, "flag", description="how the track ends: division, death or '' (seen to the end, left, lost)"
    ),
    # fate events (one row per division or death; plateloom.well.events)
    Column("event", ("events",), "flag", description="division or death"),
    Column("x_um", ("events",), "position", "um", description="the cell's position at its last frame"),
    Column("y_um", ("events",), "position", "um"),
    Column(
        "nuclear_ratio",
        ("events",),
        "measure",
        "",
        description="nuclear-channel mean intensity over the track's median before",
    ),
    Column("area_ratio", ("events",), "measure", "", description="nuclear area over the track's median before"),
    Column(
        "reporter_ratio", ("events",), "measure", "", description="first reporter's mean over the track's median before"
    ),
    # computed per well
    Column("cell_count", _W, "measure", "nuclei per site and frame", "well", "log"),
    Column("growth_rate_per_h", _W, "measure", "1/h", "well"),
    Column("cell_hours", _W, "count", "cell h", description="nuclei summed over site-frames x frame interval"),
    Column("n_divisions", _W, "count"),
    Column("n_deaths", _W, "count"),
    Column("division_rate_per_cell_h", _W, "measure", "1/(cell h)", "well"),
    Column("death_rate_per_cell_h", _W, "measure", "1/(cell h)", "well"),
    Column("died_fraction", _W, "measure", "", "well", description="deaths / (nuclei at the start + divisions)"),
    Column(
        "cycle_time_min", _W, "measure", "min", "well", description="median birth-to-division time of complete cycles"
    ),
    Column("phase_order_{channel}", ("collective", "wells"), "measure", "", "well"),
    Column("time_to_synchrony_min_{channel}", ("collective", "wells"), "measure", "min", "well"),
    Column("neighbour_correlation_{channel}", ("collective", "wells"), "measure", "", "well"),
    Column("coupled_link_fraction_d2_{channel}", ("collective", "wells"), "measure", "", "well"),
    Column("coupled_link_fraction_{channel}", ("collective", "wells"), "measure", "", "well"),
    Column("spreading_index", ("collective", "wells"), "measure", "", "well"),
    Column("spreading_p_value", ("collective", "wells"), "statistic"),
    Column("n_neighbour_links", ("collective", "wells"), "count"),
    Column("n_coupling_tests", ("collective", "wells"), "count"),
    Column("n_events", ("collective", "wells"), "count"),
    # well bookkeeping
    Column("n_observations", _W, "count"),
    Column("n_sites", _W, "count"),
    Column("n_tracks", _W, "count"),
    Column("fraction_observations_used", _W, "statistic"),
    Column("excluded_by", _W, "flag", description="the exclusion rule that left the well out ('' if kept)"),
    Column("plate_excluded_by", _W, "flag"),
    Column("cell_count_outlier", _W, "flag"),
)

# Columns a plate normalization or positional correction adds next to a feature (see
# plateloom.plate.normalization): never features themselves.
DERIVED_SUFFIXES = ("_robust_z", "_percent_of_control", "_percent_activity", "_b_score", "_uncorrected")


def _pattern(name: str) -> re.Pattern[str]:
    return re.compile("^" + re.escape(name).replace(re.escape("{channel}"), r"(?P<channel>[A-Za-z0-9_.-]+)") + "$")


@lru_cache(maxsize=1)
def _compiled() -> tuple[tuple[re.Pattern[str], Column], ...]:
    return tuple((_pattern(column.name), column) for column in REGISTRY)


@lru_cache(maxsize=4096)
def lookup(name: str) -> Column | None:
    """The registry entry of a column name (per-channel names resolved), or None if unknown."""
    for pattern, column in _compiled():
        if pattern.match(name):
            return column
    return None


def is_derived(name: str) -> bool:
    """True for a column a normalization adds next to a feature (``area_um2_robust_z``)."""
    return name.endswith(DERIVED_SUFFIXES) and lookup(name) is None


def _summarised(columns: list[str], summaries: tuple[str, ...]) -> list[str]:
    found = []
    for name in columns:
        column = lookup(name)
        if column is not None and column.summary in summaries:
            found.append(name)
    return found


def observation_features(columns: list[str]) -> list[str]:
    """The per-observation features among a cells table's columns (in their order)."""
    return _summarised(columns, ("observations",))


def track_features(columns: list[str]) -> list[str]:
    """The per-track measures summarised per well among a tracks table's columns."""
    return _summarised(columns, ("tracks",))


def well_features(columns: list[str]) -> list[str]:
    """The features of a well-profile table (cell count, summaries of observations and tracks,
    per-well readouts), in column order; normalized copies are not features."""
    return [name for name in _summarised(columns, SUMMARIES) if not is_derived(name)]


def unregistered(columns: list[str]) -> list[str]:
    """Column names the registry does not know (a test keeps every produced table free of them)."""
    return [name for name in columns if lookup(name) is None and not is_derived(name)]


# Per-object ids and positions of the cells table: never features of a cell or a well.
OBJECT_IDS_AND_POSITIONS = ("object", "track", "parent_track", "centroid_x_um", "centroid_y_um", "edge_distance_um")

# The keys of a well in the well profiles and every table made from them (layout and position).
KEY_COLUMNS = [
    "plate",
    "batch",
    "well",
    "row",
    "column",
    "is_edge",
    "role",
    "condition",
    "dose",
    "dose_unit",
    "treatment",
]
