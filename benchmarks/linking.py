"""Frame-to-frame linking at 1,000 and 10,000 cells per frame, as a ratio within one run.

Cells on a jittered grid (12 um apart) move by a Gaussian step (SD 1.5 um) between frames;
linking uses a maximum displacement of 8 um. Prints the time per frame at each size and,
last, t(10k) / t(1k) (goal <= 15, i.e. no worse than n log n).

    python benchmarks/linking.py
"""

from __future__ import annotations

import time

import numpy as np

from plateloom.well.tracking import link_frames


def time_per_frame(n: int, repeats: int, rng: np.random.Generator) -> tuple[float, float]:
    side = int(np.ceil(np.sqrt(n)))
    grid = np.array([(i, j) for i in range(side) for j in range(side)][:n], float) * 12.0
    previous = grid + rng.uniform(-3, 3, grid.shape)
    current = previous + rng.normal(0, 1.5, previous.shape)
    best = np.inf
    for _ in range(repeats):
        start = time.perf_counter()
        links = link_frames(previous, current, 8.0)
        best = min(best, time.perf_counter() - start)
    return best, float(np.mean(links == np.arange(n)))


def main() -> None:
    rng = np.random.default_rng(1)
    small, small_correct = time_per_frame(1_000, 20, rng)
    large, large_correct = time_per_frame(10_000, 5, rng)
    print(f"1,000 cells: {small * 1000:.1f} ms per frame ({small_correct:.1%} links correct)")
    print(f"10,000 cells: {large * 1000:.1f} ms per frame ({large_correct:.1%} links correct)")
    print(f"ratio t(10k) / t(1k): {large / small:.1f}")


if __name__ == "__main__":
    main()
