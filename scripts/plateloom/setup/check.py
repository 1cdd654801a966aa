"""Check before launch: config, screen sheet and layouts against the images on disk, every problem at once.

Errors stop a run (the workflow runs the same checks, without reading image headers, when it
starts); warnings are things a run would work around and report (files it would not analyse,
wells imaged but not in the layout). Each problem names the file (and row, well, site) and the fix.
"""

from __future__ import annotations

import os
from dataclasses import dataclass, field

import pandas as pd

from plateloom.errors import InputError
from plateloom.io.images import ImageIndex, index_plate_images, read_ome_metadata
from plateloom.setup.image_checks import header_problems
from plateloom.setup.screen_sheet import check_layout, check_screen_sheet

# Measured on the demo (2026-12-03): cells, tracks and site QC tables take about 255 bytes per
# nucleus and frame after compression; a well's thumbnail about 51 KB.
OUTPUT_BYTES_PER_OBSERVATION = 255
OUTPUT_BYTES_PER_WELL = 51_000


@dataclass
class Problem:
    """One finding: 'error' stops a run, 'warning' is reported and worked around."""

    severity: str
    message: str


@dataclass
class CheckReport:
    problems: list[Problem] = field(default_factory=list)
    estimate: dict[str, float] = field(default_factory=dict)

    @property
    def errors(self) -> list[Problem]:
        return [p for p in self.problems if p.severity == "error"]

    def add(self, severity: str, problem: InputError | str) -> None:
        self.problems.append(Problem(severity, str(problem)))

    def text(self) -> str:
        """The report as a person reads it: every problem, then the run estimate."""
        lines = []
        for severity in ("error", "warning"):
            found = [p for p in self.problems if p.severity == severity]
            lines.append(f"{len(found)} {severity}(s)" + (":" if found else "."))
            lines += [f"  - {p.message}" for p in found]
        if self.estimate:
            e = self.estimate
            lines.append(
                f"run estimate: {e['plates']:.0f} plates, {e['wells']:.0f} wells, {e['images']:.0f} image files "
                f"({e['image_gb']:.2f} GB), {e['jobs']:.0f} jobs; outputs about {e['output_gb']:.2f} GB "
                f"(assuming {e['assumed_objects_per_frame']:.0f} nuclei per site and frame)"
            )
        return "\n".join(lines)


def _series_problems(index: ImageIndex, wells: list[str], channels: list[str]) -> tuple[list[InputError], int]:
    """Missing channels and missing frames of every site (vectorised over the file table), and the site-frames."""
    table = index.table[index.table["well"].isin(wells)]
    problems: list[InputError] = []
    if table.empty:
        return problems, 0
    distinct = table.groupby(["well", "site"])["channel"].nunique()
    for well, site in distinct[distinct < len(channels)].index:  # only the few incomplete sites in Python
        found = set(table.loc[(table["well"] == well) & (table["site"] == site), "channel"])
        for channel in channels:
            if channel not in found:
                problems.append(
                    InputError(
                        f"well {well}, site {site}",
                        f"no image for channel {channel!r}.",
                        "copy or export the missing channel, or check images.filename_template.",
                    )
                )
    if index.stacks:
        return problems, 0
    series = table.groupby(["well", "site", "channel"])["frame"].agg(["min", "max", "count"])
    for (well, site, channel), row in series[series["max"] - series["min"] + 1 != series["count"]].iterrows():
        frames = set(
            table.loc[(table["well"] == well) & (table["site"] == site) & (table["channel"] == channel), "frame"]
        )
        missing = sorted(set(range(int(row["min"]), int(row["max"]) + 1)) - frames)
        problems.append(
            InputError(
                f"well {well}, site {site}, channel {channel}",
                f"frames {missing} are missing.",
                "re-export the missing frames (a run would flag them and go on).",
            )
        )
    counts = series["max"] - series["min"] + 1
    uneven = counts.groupby(level=["well", "site"]).nunique() > 1
    for well, site in uneven[uneven].index:
        detail = ", ".join(f"{c}: {int(n)}" for c, n in counts.loc[well].loc[site].items())
        problems.append(
            InputError(
                f"well {well}, site {site}",
                f"channels have different frame counts ({detail}).",
                "re-export the shorter series (a run would flag the missing frames).",
            )
        )
    return problems, int(counts.groupby(level=["well", "site"]).max().sum())


def _shown(names: list[str], at_most: int, quote: bool = False) -> str:
    listed = ", ".join(repr(n) if quote else n for n in names[:at_most])
    return listed + (f" and {len(names) - at_most} more" if quote and len(names) > at_most else "")


class _ScreenCheck:
    """The checks of ``check_screen``, plate by plate, with what plates share read once
    (layouts, image folders, series of the same wells) and the totals of the run estimate."""

    def __init__(self, config: dict, read_headers: bool):
        self.config, self.read_headers = config, read_headers
        self.report = CheckReport()
        self.channels = [c["name"] for c in config["channels"]]
        self.template = config["images"]["filename_template"]
        self.totals = {"plates": 0, "wells": 0, "images": 0, "image_bytes": 0, "site_frames": 0, "jobs": 0}
        self.layouts: dict[tuple[str, int], tuple] = {}
        self.indexes: dict[tuple[str, int], ImageIndex] = {}
        self.series: dict[tuple, tuple[list[InputError], int]] = {}
        self.imaged: dict[tuple[str, int], set[str]] = {}
        self.plate_layouts: list[pd.DataFrame] = []

    def plate(self, entry) -> None:
        layout = self._layout(entry)
        index = self._index(entry)
        if layout is not None:
            self.plate_layouts.append(layout.assign(plate=entry.plate))
        if index is None or layout is None:
            return
        self.totals["plates"] += 1
        self._unmatched(entry, index)
        analysed = set(layout.loc[layout["role"] != "empty", "well"])
        imaged = self.imaged.setdefault((entry.image_folder, entry.plate_format), set(index.table["well"].to_numpy()))
        self._well_coverage(entry, layout, analysed, imaged)
        wells = sorted(analysed & imaged)
        self.totals["wells"] += len(wells)
        self.totals["jobs"] += -(-len(analysed) // int(self.config["chunk_wells"])) + 2 + len(self.channels)
        self._frames_and_headers(entry, index, wells)

    def _layout(self, entry):
        """The plate's layout (problems reported); None when the file cannot be read at all."""
        key = (entry.layout, entry.plate_format)
        if key not in self.layouts:  # plates often share a layout
            try:
                self.layouts[key] = check_layout(entry.layout, entry.plate_format)
            except InputError as error:  # unreadable, empty, not UTF-8, or without its key columns
                self.layouts[key] = (None, [error])
        layout, problems = self.layouts[key]
        for problem in problems:
            self.report.add("error", InputError(f"plate {entry.plate}: {problem.where}", problem.problem, problem.fix))
        return layout

    def _index(self, entry) -> ImageIndex | None:
        from plateloom.setup.plan import DEMO_IMAGE_ROOT

        if not os.path.isdir(entry.image_folder):
            if os.path.normpath(entry.image_folder) != os.path.join(DEMO_IMAGE_ROOT, entry.plate):
                where = f"{self.config['screen_sheet']}, plate {entry.plate}, column image_folder"
                fix = "check the path (relative to the folder you run snakemake from)."
                self.report.add("error", InputError(where, f"image folder {entry.image_folder!r} does not exist.", fix))
            return None
        key = (entry.image_folder, entry.plate_format)
        try:
            if key not in self.indexes:
                self.indexes[key] = index_plate_images(
                    entry.image_folder, self.template, entry.plate_format, self.channels
                )
        except InputError as error:
            self.report.add("error", error)
            return None
        return self.indexes[key]

    def _unmatched(self, entry, index: ImageIndex) -> None:
        unmatched = [n for n in index.unmatched if not n.startswith(".")]
        if unmatched:
            problem = (
                f"{len(unmatched)} file(s) match neither images.filename_template {self.template!r} nor a "
                f"configured channel: {_shown(unmatched, 5, quote=True)}."
            )
            fix = "rename them, or adjust the template or channels; they would not be analysed."
            self.report.add("warning", InputError(entry.image_folder, problem, fix))

    def _well_coverage(self, entry, layout, analysed: set[str], imaged: set[str]) -> None:
        no_images = sorted(analysed - imaged)
        if no_images:
            more = " ..." if len(no_images) > 12 else ""
            problem = f"{len(no_images)} well(s) in the layout have no images: {_shown(no_images, 12)}{more}."
            fix = "mark them empty in the layout, or add their images to " + entry.image_folder + "."
            self.report.add("error", InputError(f"{entry.layout} (plate {entry.plate})", problem, fix))
        not_in_layout = sorted(imaged - set(layout["well"]))
        if not_in_layout:
            more = " ..." if len(not_in_layout) > 12 else ""
            problem = f"{len(not_in_layout)} imaged well(s) have no layout row: {_shown(not_in_layout, 12)}{more}."
            fix = f"add them to {entry.layout} (role empty to skip them on purpose)."
            self.report.add("warning", InputError(f"{entry.image_folder} (plate {entry.plate})", problem, fix))

    def _frames_and_headers(self, entry, index: ImageIndex, wells: list[str]) -> None:
        series_key = (entry.image_folder, entry.plate_format, tuple(wells))
        if series_key not in self.series:  # plates sharing a folder and wells share the answer
            self.series[series_key] = _series_problems(index, wells, self.channels)
        series, site_frames = self.series[series_key]
        with_headers = self.read_headers and index.source == "tiff"
        headers, stack_frames = header_problems(index, wells) if with_headers else ([], 0)
        for problem in series + headers:
            severity = "warning" if "missing" in problem.problem or "frame counts" in problem.problem else "error"
            self.report.add(severity, InputError(f"plate {entry.plate}: {problem.where}", problem.problem, problem.fix))
        self.totals["site_frames"] += site_frames + stack_frames
        in_wells = index.table["well"].isin(wells).to_numpy()
        self.totals["images"] += int(in_wells.sum())
        if with_headers:  # sizes for the run estimate; not needed at start-up
            self.totals["image_bytes"] += sum(os.path.getsize(p) for p in index.table["path"].to_numpy()[in_wells])

    def image_scale(self) -> None:
        """An error when pixel size or frame interval is neither in config nor in the first image's
        metadata, or the metadata gives zero or less."""
        unset = [k for k in ("pixel_size_um", "frame_interval_min") if self.config["images"].get(k) is None]
        if unset:
            first = next((sorted(i.table["path"])[0] for i in self.indexes.values() if len(i.table)), None)
            for problem in _scale_problems(unset, first):
                self.report.add("error", problem)

    def estimate(self, assumed_objects_per_frame: int) -> dict:
        totals = self.totals
        observations = totals["site_frames"] * assumed_objects_per_frame
        return {
            "plates": totals["plates"],
            "wells": totals["wells"],
            "images": totals["images"],
            "image_gb": totals["image_bytes"] / 1e9,
            "jobs": totals["jobs"] + (6 if totals["plates"] else 0),
            "output_gb": (observations * OUTPUT_BYTES_PER_OBSERVATION + totals["wells"] * OUTPUT_BYTES_PER_WELL) / 1e9,
            "assumed_objects_per_frame": assumed_objects_per_frame,
        }


def _scale_problems(unset: list[str], first: str | None) -> list[InputError]:
    """Problems with the scale keys that config leaves to the first image's OME metadata."""
    metadata = read_ome_metadata(first) if first else None
    found = {k: getattr(metadata, k) if metadata else None for k in unset}
    missing = [k for k, value in found.items() if value is None]
    not_positive = [k for k, value in found.items() if value is not None and not value > 0]
    return [
        InputError(
            f"config images ({first or 'no image'})",
            f"{' and '.join(keys)} {problem}",
            f"set images.{' and images.'.join(keys)} in the config.",
        )
        for keys, problem in (
            (missing, "not set and not in the images' OME metadata."),
            (not_positive, "set to zero or less in the images' OME metadata."),
        )
        if keys
    ]


def _objects_per_frame(config: dict, entries: list, given: int | None) -> int:
    """Nuclei per site and frame for the output estimate: as given, the demo scenario's when every
    plate is one of its plates, else 200 (a dense 1024 x 1024 field)."""
    if given is not None:
        return given
    from plateloom.assets import demo_scenario
    from plateloom.demo.scenario import demo_plates, load_scenario

    path = config["demo"].get("scenario") or str(demo_scenario())
    scenario = load_scenario(path, size=config["demo"].get("size", "quick")) if os.path.isfile(path) else None
    if scenario and entries and all(e.plate in demo_plates(scenario) for e in entries):
        return int(scenario["cells_per_site"])
    return 200


def check_screen(config: dict, read_headers: bool = True, assumed_objects_per_frame: int | None = None) -> CheckReport:
    """Every problem of a screen's config, sheet, layouts and images, and an estimate of the run.

    ``config`` is the validated config (defaults filled). With ``read_headers`` every TIFF's
    header is read (image sizes, page counts); without, only names are checked (fast enough
    for every workflow start). Demo plates whose images are not simulated yet are skipped.
    """
    from plateloom.screen.design_warnings import design_warnings
    from plateloom.setup.plan import channel_names

    check = _ScreenCheck(config, read_headers)
    try:
        channel_names(config)
    except InputError as error:
        check.report.add("error", error)
    try:
        entries, problems = check_screen_sheet(config["screen_sheet"])
    except InputError as error:
        check.report.add("error", error)
        return check.report
    for problem in problems:
        check.report.add("error", problem)
    for entry in entries:
        check.plate(entry)
    batches = {entry.batch for entry in entries}
    if len(entries) > 1 and len(batches) == 1:
        check.report.add(
            "warning",
            InputError(
                config["screen_sheet"],
                f"every plate is in batch {next(iter(batches))}: day-to-day variation cannot be estimated, "
                "and intervals hold for this imaging day only",
                "give each imaging day its own batch value (the scaffold prints where each came from)",
            ),
        )
    if check.plate_layouts:
        for warning in design_warnings(pd.concat(check.plate_layouts, ignore_index=True)):
            check.report.add("warning", InputError(config["screen_sheet"], warning))
    if entries:
        check.image_scale()
    check.report.estimate = check.estimate(_objects_per_frame(config, entries, assumed_objects_per_frame))
    return check.report


def load_config(path: str) -> dict:
    """A config file validated against the workflow's schema, defaults filled; every schema problem
    in one InputError."""
    import yaml
    from snakemake.utils import validate

    from plateloom.settings import config_problems
    from plateloom.setup.config import SCHEMA as schema_path

    try:
        with open(path, encoding="utf-8") as handle:
            config = yaml.safe_load(handle) or {}
    except yaml.YAMLError as error:
        mark = getattr(error, "problem_mark", None)
        where = f" at line {mark.line + 1}, column {mark.column + 1}" if mark else ""
        problem = getattr(error, "problem", None) or "not valid YAML"
        raise InputError(
            f"config {path}", f"is not valid YAML{where}: {problem}.", "fix that line (quotes, brackets, indentation)."
        ) from None
    except (OSError, UnicodeDecodeError) as error:
        raise InputError(
            f"config {path}", f"cannot be read ({error}).", "give the path of a UTF-8 YAML config."
        ) from None
    if not isinstance(config, dict):
        raise InputError(f"config {path}", "is not a mapping of keys to values.", "start from config/config.yaml.")
    problems = config_problems(config)
    if problems:
        raise InputError(f"config {path}", "; ".join(problems) + ".", "every key is described in config/REFERENCE.md.")
    validate(config, schema_path)
    return config
