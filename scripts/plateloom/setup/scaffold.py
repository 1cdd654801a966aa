"""Scaffold a screen from an image folder: infer the filename template, describe what is there,
write a config, a screen sheet and an empty layout per plate format.

A folder of image files is one plate; a folder of sub-folders holding image files is one plate
per sub-folder. Nothing is asked interactively and no existing file is overwritten unless asked.
"""

from __future__ import annotations

import datetime as dt
import os
import re
from collections import Counter
from dataclasses import dataclass

import pandas as pd
import tifffile
import yaml

from plateloom.errors import InputError
from plateloom.io.images import (
    channel_key,
    index_plate_images,
    read_ome_metadata,
    template_regex,
)
from plateloom.settings import schema_defaults
from plateloom.setup.plate_formats import FORMATS as PLATE_FORMATS
from plateloom.setup.plate_formats import parse_well, plate_format
from plateloom.well.collective import MODELLED_READOUTS

IMAGE_EXTENSIONS = (".ome.tiff", ".ome.tif", ".tiff", ".tif")
SEPARATORS = r"([_\-. ])"
WELL_TOKEN = re.compile(r"^[A-Za-z]{1,2}\d{1,2}$")
NUMBERED_TOKEN = re.compile(r"^([A-Za-z]*)(\d+)$")
SITE_PREFIXES = ("s", "site", "f", "field", "p", "pos", "position", "v", "view")
FRAME_PREFIXES = ("t", "time", "tp", "frame", "fr")
NUCLEAR_STAINS = re.compile(r"dapi|hoechst|nuc|dna|h2b|draq", re.IGNORECASE)


@dataclass(frozen=True)
class PlateFolder:
    """One plate found by the scaffold: its id, folder, files and imaging date (the batch)."""

    plate: str
    folder: str
    files: tuple[str, ...]
    batch: str
    batch_source: str = "OME AcquisitionDate"  # or "file modification time"


def _split(name: str) -> tuple[list[str], str] | None:
    lower = name.lower()
    extension = next((e for e in IMAGE_EXTENSIONS if lower.endswith(e)), None)
    if extension is None:
        return None
    return re.split(SEPARATORS, name[: -len(extension)]), name[-len(extension) :]


def _number_kind(prefix: str, varies: bool) -> str:
    """site, frame, numbered (a varying number with an unknown prefix) or '' (a constant)."""
    if prefix.lower() in SITE_PREFIXES:
        return "site"
    if prefix.lower() in FRAME_PREFIXES:
        return "frame"
    return "numbered" if varies else ""


def _token_field(values: list[str], well_found: bool) -> tuple[str, str]:
    """(template field, number kind or '') of one token position from its values across the files."""
    matches = [NUMBERED_TOKEN.match(v) for v in values]
    prefixes = {m.group(1).lower() for m in matches if m}
    known_prefix = len(prefixes) == 1 and next(iter(prefixes)) in SITE_PREFIXES + FRAME_PREFIXES
    if all(WELL_TOKEN.match(v) for v in values) and not known_prefix and not well_found:
        return "{well}", ""
    if all(matches) and len(prefixes) == 1:
        prefix = matches[0].group(1)
        kind = _number_kind(prefix, len(set(values)) > 1)
        if kind:
            return prefix + "{" + kind + "}", kind
    return (values[0] if len(set(values)) == 1 else "{channel}"), ""


def _name_unprefixed_numbers(fields: list[str], numbered: list[tuple[int, str]]) -> None:
    """Numbered parts without a telling prefix: the first is the site, then the frame (in place)."""
    kinds = [k for _, k in numbered]
    for index, kind in numbered:
        if kind == "numbered":
            chosen = "site" if "site" not in kinds else "frame"
            kinds.append(chosen)
            fields[index] = fields[index].replace("{numbered}", "{" + chosen + "}")


def _name_a_single_channel(fields: list[str]) -> None:
    """A single-channel folder (B02_s1_dapi.tif everywhere): the last constant word after the well
    is the channel's name, so the template gets {channel} (in place)."""
    if "{channel}" in fields or "{well}" not in fields:
        return
    after_well = range(fields.index("{well}") + 1, len(fields))
    words = [i for i in after_well if "{" not in fields[i] and re.search("[A-Za-z]", fields[i])]
    if words:
        fields[words[-1]] = "{channel}"


def infer_template(names: list[str]) -> str:
    """The filename template (fields {well}, {site}, {frame}, {channel}) that fits most of ``names``.

    Names are cut at '_', '-', '.' and ' '; the most common cut pattern is used. Across the
    files, a part that always looks like a well (B03) is {well}; a part of constant letters
    and varying digits is {site} or {frame} by its letters (s, site, f, field, p, pos; t, tp,
    time, frame); a varying word is {channel}, and so is the last constant word after the well
    when no word varies (a single-channel folder); any other constant part is kept as it is.
    """
    parts = [p for p in (_split(n) for n in names) if p is not None]
    if not parts:
        raise InputError(
            "image folder", "no .tif/.tiff files found.", "point the scaffold at the folder your microscope wrote."
        )
    shapes = Counter((tuple(tokens[1::2]), extension) for tokens, extension in parts)
    (separators, extension), _ = shapes.most_common(1)[0]
    group = [tokens for tokens, ext in parts if (tuple(tokens[1::2]), ext) == (separators, extension)]
    fields: list[str] = []
    numbered: list[tuple[int, str]] = []
    for position in range(0, len(group[0]), 2):
        field, kind = _token_field([tokens[position] for tokens in group], "{well}" in fields)
        if kind:
            numbered.append((len(fields), kind))
        fields.append(field)
    _name_unprefixed_numbers(fields, numbered)
    _name_a_single_channel(fields)
    template = "".join(f + (separators[i] if i < len(separators) else "") for i, f in enumerate(fields)) + extension
    if "{site}" not in template:  # one site per well: the template needs the field, so none is inferred
        raise InputError(
            "image folder",
            f"could not find a site number in names like {names[0]!r} (inferred {template!r}).",
            "name files with a site (field) number such as _s1_, or write images.filename_template by hand.",
        )
    template_regex(template)
    return template


def find_plates(folder: str) -> list[PlateFolder]:
    """Plates under ``folder``: itself if it holds image files, else each sub-folder that does."""

    def images_in(path: str) -> list[str]:
        return sorted(n for n in os.listdir(path) if _split(n) is not None and os.path.isfile(os.path.join(path, n)))

    if not os.path.isdir(folder):
        raise InputError(folder, "the image folder does not exist.", "give the folder your microscope wrote.")
    candidates = (
        [folder]
        if images_in(folder)
        else [os.path.join(folder, d) for d in sorted(os.listdir(folder)) if os.path.isdir(os.path.join(folder, d))]
    )
    plates = []
    for path in candidates:
        files = images_in(path)
        if files:
            plate = re.sub(r"[^A-Za-z0-9._-]", "-", os.path.basename(os.path.normpath(path)))
            plates.append(PlateFolder(plate, path, tuple(files), *_imaging_date(os.path.join(path, files[0]))))
    if not plates:
        raise InputError(
            folder, "no .tif/.tiff files in it or in its sub-folders.", "point the scaffold at the image folder."
        )
    return plates


MODIFICATION_TIME = "file modification time"


def _imaging_date(path: str) -> tuple[str, str]:
    """The acquisition date (YYYY-MM-DD) and where it came from: OME metadata, else the file's
    modification date (which a copy changes: the scaffold says so)."""
    try:
        with tifffile.TiffFile(path) as tif:
            xml = tif.ome_metadata or ""
        found = re.search(r"<AcquisitionDate>(\d{4}-\d{2}-\d{2})", xml)
        if found:
            return found.group(1), "OME AcquisitionDate"
    except Exception:  # an unreadable file is reported by the check; the date falls back to the file's
        pass
    return dt.date.fromtimestamp(os.path.getmtime(path)).isoformat(), MODIFICATION_TIME


def _smallest_format(wells: list[str]) -> int:
    rows = max(parse_well(w)[0] for w in wells) + 1
    columns = max(parse_well(w)[1] for w in wells) + 1
    for size in sorted(PLATE_FORMATS):
        fmt = plate_format(size)
        if rows <= fmt.rows and columns <= fmt.columns:
            return size
    return max(PLATE_FORMATS)


@dataclass
class ScreenSurvey:
    """What the scaffold found: template, plates, channels, sizes, and the per-plate well lists."""

    template: str
    plates: list[PlateFolder]
    plate_formats: dict[str, int]
    wells: dict[str, list[str]]
    sites: int
    frames: int
    channels: list[str]
    image_shape: tuple[int, ...]
    dtype: str
    pixel_size_um: float | None
    frame_interval_min: float | None

    def text(self) -> str:
        lines = [
            f"filename template: {self.template}",
            f"plates: {len(self.plates)} ({', '.join(self._plate_text(p) for p in self.plates)})",
            f"wells with images: {sum(len(w) for w in self.wells.values())} "
            f"({', '.join(f'{p}: {len(w)}' for p, w in self.wells.items())})",
            f"sites per well: {self.sites}; frames per site: {self.frames}",
            f"channels: {', '.join(self.channels)}",
            f"image size: {' x '.join(map(str, self.image_shape))} pixels, {self.dtype}",
            "pixel size: "
            + (f"{self.pixel_size_um:g} um (OME metadata)" if self.pixel_size_um else "not in the metadata"),
            "frame interval: "
            + (f"{self.frame_interval_min:g} min (OME metadata)" if self.frame_interval_min else "not in the metadata"),
        ]
        if any(p.batch_source == MODIFICATION_TIME for p in self.plates):
            lines.append(
                "batch: the imaging date of some plates comes from the file modification time (no OME "
                "AcquisitionDate); a copy changes it: check the batch column of the screen sheet"
            )
        return "\n".join(lines)

    def _plate_text(self, plate: PlateFolder) -> str:
        return f"{plate.plate} [batch {plate.batch} from {plate.batch_source}, {self.plate_formats[plate.plate]} wells]"


def _survey_channels(plates: list[PlateFolder], template: str) -> list[str]:
    """Channel names: from the {channel} field of the file names, else from the OME metadata."""
    regex = template_regex(template)
    if "{channel}" in template:
        return sorted({regex.match(n).group("channel") for p in plates for n in p.files if regex.match(n)})
    # one multi-channel OME-TIFF per site: channels named in its metadata
    first = os.path.join(plates[0].folder, next(n for n in plates[0].files if regex.match(n)))
    metadata = read_ome_metadata(first)
    channels = [channel_key(c) for c in (metadata.channel_names if metadata else ())]
    if not channels:
        raise InputError(
            first,
            "has no {channel} in its name and no channel names in OME metadata.",
            "export one file per channel, or OME-TIFF with channel names.",
        )
    return channels


def _frames_of(index) -> int:
    """The most frames of any site and channel of one plate's image index."""
    if index.stacks:
        with tifffile.TiffFile(index.table["path"].iloc[0]) as tif:
            return len(tif.pages)
    return int(index.table.groupby(["well", "site", "channel"]).size().max())


def survey_folder(folder: str, plate_format_wells: int | None = None) -> ScreenSurvey:
    """Look at an image folder and describe the screen in it (nothing is written)."""
    plates = find_plates(folder)
    template = infer_template(list(plates[0].files))  # plates may differ in constant parts (plate names)
    regex = template_regex(template)
    channels = _survey_channels(plates, template)
    formats, wells, sites, frames = {}, {}, 1, 1
    first_path = None
    for plate in plates:
        names = [n for n in plate.files if regex.match(n)]
        plate_wells = sorted({regex.match(n).group("well").upper() for n in names}, key=parse_well)
        formats[plate.plate] = plate_format_wells or _smallest_format(plate_wells)
        index = index_plate_images(plate.folder, template, formats[plate.plate], channels)
        wells[plate.plate] = sorted(index.table["well"].unique(), key=parse_well)
        sites = max(sites, int(index.table.groupby("well")["site"].nunique().max()))
        frames = max(frames, _frames_of(index))
        first_path = first_path or index.table["path"].iloc[0]
    with tifffile.TiffFile(first_path) as tif:
        page = tif.pages[0]
        shape, dtype = tuple(page.shape), str(page.dtype)
    metadata = read_ome_metadata(first_path)
    pixel_size = metadata.pixel_size_um if metadata else None
    interval = metadata.frame_interval_min if metadata else None
    return ScreenSurvey(template, plates, formats, wells, sites, frames, channels, shape, dtype, pixel_size, interval)


def _default_config() -> dict:
    config = schema_defaults()
    config.pop("demo", None)
    return config


def _write_sheet_and_layouts(survey: ScreenSurvey, sheet_path: str, layouts: dict[int, str]) -> None:
    """The screen sheet (one row per plate) and one layout per plate format listing every imaged well as empty."""
    rows = [
        {
            "plate": p.plate,
            "batch": p.batch,
            "plate_format": survey.plate_formats[p.plate],
            "layout": layouts[survey.plate_formats[p.plate]],
            "image_folder": p.folder,
        }
        for p in survey.plates
    ]
    pd.DataFrame(rows).to_csv(sheet_path, index=False)
    for size, path in layouts.items():
        of_size = [p for p in survey.plates if survey.plate_formats[p.plate] == size]
        imaged = sorted({w for p in of_size for w in survey.wells[p.plate]}, key=parse_well)
        empty = {"well": imaged, "role": "empty", "condition": "", "dose": "", "dose_unit": ""}
        pd.DataFrame(empty).to_csv(path, index=False)


def scaffold_config(survey: ScreenSurvey, sheet_path: str, results_dir: str) -> dict:
    """The config of a surveyed screen: schema defaults, the inferred images and channels (the
    nuclear-looking one segmented, the next a reporter), job sizes from the images."""
    nuclear = next((c for c in survey.channels if NUCLEAR_STAINS.search(c)), survey.channels[0])
    others = [c for c in survey.channels if c != nuclear]
    channels = [{"name": nuclear, "role": "nuclei"}] + [
        {"name": c, "role": "reporter" if i == 0 else "other"} for i, c in enumerate(others)
    ]
    config = _default_config()
    config.update({"screen_sheet": sheet_path, "results_dir": results_dir, "channels": channels})
    config["images"] = {
        "filename_template": survey.template,
        "pixel_size_um": survey.pixel_size_um,
        "frame_interval_min": survey.frame_interval_min,
    }
    sizes = {"image_side_px": int(max(survey.image_shape)), "frames_per_site": survey.frames}
    config["job_sizing"].update(sizes | {"sites_per_well": survey.sites})
    if others and survey.frames >= config["collective"]["min_overlap_frames"]:
        # a reporter imaged long enough for the neighbour readouts: model them too
        config["screen"]["features"] = list(config["screen"]["features"]) + list(MODELLED_READOUTS)
    return config


def write_scaffold(survey: ScreenSurvey, out: str, force: bool = False) -> list[str]:
    """Write <out>/config.yaml, <out>/plates.csv and <out>/layouts/plate_<format>.csv; return their paths.

    Paths inside are relative to the folder the scaffold is run from (run the workflow from there).
    Existing files are kept unless ``force``; the layouts list every imaged well with role
    empty, for the user to fill in.
    """
    formats = sorted(set(survey.plate_formats.values()))
    layouts = {size: os.path.join(out, "layouts", f"plate_{size}.csv") for size in formats}
    targets = [os.path.join(out, "config.yaml"), os.path.join(out, "plates.csv"), *layouts.values()]
    existing = [t for t in targets if os.path.exists(t)]
    if existing and not force:
        raise InputError(
            existing[0],
            "exists already; the scaffold never overwrites a file.",
            "choose another --out folder, or add --force to replace the scaffold's files.",
        )
    os.makedirs(os.path.join(out, "layouts"), exist_ok=True)
    _write_sheet_and_layouts(survey, targets[1], layouts)
    config = scaffold_config(survey, targets[1], os.path.join(out, "results"))
    header = (
        "# Written by `plateloom scaffold` from the images it found; `plateloom config-reference`\n"
        "# describes every key. Check the channel roles (nuclei = the stain segmented), fill in the\n"
        "# layouts, then: plateloom check --config " + targets[0] + "\n"
    )
    with open(targets[0], "w", encoding="utf-8") as handle:
        handle.write(header + yaml.safe_dump(config, sort_keys=False, allow_unicode=True))
    return targets
