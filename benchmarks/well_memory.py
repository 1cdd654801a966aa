"""Peak memory of one per-well job: 100 frames x 2 channels of 1024x1024, as a ratio to one channel's stack.

Writes a site of ``frames`` frames (nuclear stain and a cytoplasm stain; a few simulated frames
cycled, shifted by a few pixels each time so nuclei move), then analyses the well in a fresh
Python process and reads that process's peak resident memory (VmHWM) and its resident memory
after imports. Prints both and, last, (peak - after imports) / size of one channel's stack as
stored (uint16), goal <= 2: frames are streamed, not all held.

    python benchmarks/well_memory.py [frames]
"""

from __future__ import annotations

import subprocess
import sys
import tempfile
from pathlib import Path

import numpy as np
import tifffile
from scipy import ndimage

from plateloom.demo.scenario import QUANTITIES, load_scenario
from plateloom.demo.simulate import simulate_site

ROOT = Path(__file__).resolve().parents[1]
DISTINCT_FRAMES = 4

CHILD = """
import sys
from plateloom.io.images import index_plate_images
from plateloom.well.stage import WellSettings, analyse_well

def rss(key):
    with open('/proc/self/status') as status:
        return next(int(line.split()[1]) for line in status if line.startswith(key)) / 1024

folder = sys.argv[1]
settings = WellSettings.of_demo(channels=("nuclear", "body"), cell_body_channel="body", reporter_channels=("nuclear",))
index = index_plate_images(folder, "{well}_s{site}_{channel}.tif", 96, ["nuclear", "body"])
baseline = rss("VmRSS:")
cells, tracks, qc = analyse_well(index, "B02", settings)
print(baseline, rss("VmHWM:"), len(cells), len(qc))
"""


def write_site(folder: Path, frames: int) -> None:
    scenario = load_scenario(str(ROOT / "resources/demo/scenario.yaml"), frames=DISTINCT_FRAMES, image_size_px=1024)
    scenario["cells_per_site"] = 250
    stack, truth = simulate_site(scenario, {q: 1.0 for q in QUANTITIES}, np.random.default_rng(5), with_truth=True)
    body = np.empty_like(stack[:, 0])
    for frame in range(DISTINCT_FRAMES):
        distance = ndimage.distance_transform_edt(truth.labels[frame] == 0)
        body[frame] = (150 + ndimage.gaussian_filter((distance < 8).astype(np.float32) * 500, 1.5)).astype(np.uint16)

    def pages(source):
        for frame in range(frames):
            yield np.roll(source[frame % DISTINCT_FRAMES], 2 * (frame // DISTINCT_FRAMES), axis=1)

    for name, source in (("nuclear", stack[:, 0]), ("body", body)):
        tifffile.imwrite(
            folder / f"B02_s1_{name}.tif",
            pages(source),
            shape=(frames, 1024, 1024),
            dtype=np.uint16,
            photometric="minisblack",
        )


def main() -> None:
    frames = int(sys.argv[1]) if len(sys.argv) > 1 else 100
    with tempfile.TemporaryDirectory() as tmp:
        write_site(Path(tmp), frames)
        output = subprocess.run([sys.executable, "-c", CHILD, tmp], capture_output=True, text=True, check=True).stdout
    baseline, peak, n_cells, n_frames = output.split()
    stack_mb = frames * 1024 * 1024 * 2 / 2**20
    working = float(peak) - float(baseline)
    print(f"frames: {n_frames} x 2 channels of 1024x1024; observations: {n_cells}")
    print(f"one channel's stack (uint16): {stack_mb:.0f} MB")
    print(f"resident after imports: {float(baseline):.0f} MB; peak: {float(peak):.0f} MB; working: {working:.0f} MB")
    print(f"working peak / one channel's stack: {working / stack_mb:.2f} (goal <= 2)")


if __name__ == "__main__":
    main()
