"""The image files each job reads, as its Snakemake inputs: a re-copied image reruns exactly the
jobs that read it (its chunk, or the flat field if its site is sampled), and a new file that no job
reads (notes, another channel) reruns nothing.

A generated demo plate and an OME-Zarr plate are given as their folder (the demo's is the output
of the rule that writes it; a Zarr store's files are not images one by one).
"""

from __future__ import annotations

from dataclasses import dataclass, field

from plateloom.io.images import ImageIndex, index_plate_images
from plateloom.setup.screen_sheet import PlateEntry
from plateloom.well.illumination import sampled_sites


@dataclass
class ImageInputs:
    """Per-plate image indexes (built once) and the files of chunks and flat fields."""

    template: str
    channels: list[str]
    max_sites: int
    generated: set[str]  # plates whose images a rule writes (the demo)
    indexes: dict[str, ImageIndex | None] = field(default_factory=dict)

    def index(self, entry: PlateEntry) -> ImageIndex | None:
        """The plate's image index; None for a generated or a Zarr plate."""
        if entry.plate not in self.indexes:
            found = None
            if entry.plate not in self.generated:
                found = index_plate_images(entry.image_folder, self.template, entry.plate_format, self.channels)
            self.indexes[entry.plate] = None if found is None or found.source == "zarr" else found
        return self.indexes[entry.plate]

    def chunk_files(self, entry: PlateEntry, wells: list[str]) -> list[str] | str:
        """The image files of ``wells`` (or the plate's folder, see the module docstring)."""
        index = self.index(entry)
        if index is None:
            return entry.image_folder
        return _files(index.table[index.table["well"].isin(wells)])

    def illumination_files(self, entry: PlateEntry, channel: str) -> list[str] | str:
        """The files of one channel at the sites the flat field samples (or the plate's folder)."""
        index = self.index(entry)
        if index is None:
            return entry.image_folder
        sites = set(sampled_sites(index, self.max_sites))
        table = index.table
        at_sites = [(w, int(s)) in sites for w, s in zip(table["well"], table["site"])]
        return _files(table[at_sites & (table["channel"] == channel).to_numpy()])


def _files(table) -> list[str]:
    """Distinct file paths of index rows (a multi-channel file's channel suffix '::n' removed)."""
    return sorted({path.split("::")[0] for path in table["path"]})
