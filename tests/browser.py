"""Headless Chromium for the report tests: a page's DOM after its scripts ran, its console messages,
the network requests the page itself made (from Chromium's net log), and full-width screenshots."""

from __future__ import annotations

import json
import os
import re
import shutil
import subprocess
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pytest

QUIET = [
    "--headless",
    "--no-sandbox",
    "--disable-gpu",
    "--disable-quic",
    "--no-first-run",
    "--disable-background-networking",
    "--disable-component-update",
    "--disable-sync",
]


def chromium() -> str | None:
    return shutil.which("chromium") or shutil.which("chromium-browser")


def require_chromium() -> str:
    """The browser's path; skips the test when it is missing, unless PLATELOOM_REQUIRE_CHROMIUM is set (CI)."""
    found = chromium()
    if found is None:
        if os.environ.get("PLATELOOM_REQUIRE_CHROMIUM"):
            pytest.fail("chromium is required here (PLATELOOM_REQUIRE_CHROMIUM is set) but not installed")
        pytest.skip("Debian package chromium not installed (.ci/run installs it)")
    return found


@dataclass(frozen=True)
class Visit:
    dom: str
    console: list[str]  # every console message, uncaught errors included
    requests: list[str]  # URLs the page asked the network for (the browser's own services left out)


def _page_requests(net_log: Path) -> list[str]:
    # A request the page made carries the page's file:// network isolation key; the browser's own
    # update and account requests do not.
    log = json.loads(net_log.read_text(encoding="utf-8", errors="replace").rstrip().rstrip(",") or "{}")
    types = {code: name for name, code in log.get("constants", {}).get("logEventTypes", {}).items()}
    return [
        event["params"]["url"]
        for event in log.get("events", [])
        if types.get(event.get("type")) == "URL_REQUEST_START_JOB"
        and "file://" in str(event.get("params", {}).get("network_isolation_key", ""))
    ]


def visit(page: Path, scratch: Path) -> Visit:
    """Open ``page`` once: DOM after scripts, console lines, page network requests."""
    scratch.mkdir(parents=True, exist_ok=True)
    net_log = scratch / f"{page.stem}.netlog.json"
    command = [require_chromium(), *QUIET, f"--user-data-dir={scratch / 'profile'}", "--enable-logging=stderr"]
    command += ["--v=0", f"--log-net-log={net_log}", "--virtual-time-budget=3000", "--dump-dom", page.as_uri()]
    done = subprocess.run(command, check=True, capture_output=True, text=True, timeout=180)
    console = re.findall(r":CONSOLE[^\]]*\] (.*)", done.stderr)
    return Visit(done.stdout, console, _page_requests(net_log))


def screenshot(page: Path, target: Path, scratch: Path, width: int = 1400, height: int = 12000) -> np.ndarray:
    """A screenshot of ``page`` in a window ``width`` x ``height`` px, read back as an RGB(A) array."""
    from skimage.io import imread

    command = [require_chromium(), *QUIET, f"--user-data-dir={scratch / 'profile'}", "--hide-scrollbars"]
    command += [f"--window-size={width},{height}", f"--screenshot={target}", page.as_uri()]
    subprocess.run(command, check=True, capture_output=True, timeout=180)
    return imread(target)


def content_height(image: np.ndarray) -> int:
    """Rows down to the last one that differs from the page background (the bottom-right pixel), px."""
    rgb = image[..., :3].astype(int)
    differs = np.abs(rgb - rgb[-1, -1]).sum(axis=-1).max(axis=1) > 0
    rows = np.flatnonzero(differs)
    return int(rows[-1] + 1) if rows.size else 0
