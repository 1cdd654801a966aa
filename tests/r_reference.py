"""Run R (``Rscript``) as a reference: skip where R or a package is missing, unless CI requires it.

CI sets PLATELOOM_REQUIRE_R=1 (``.ci/run`` installs the Debian r-cran-* packages), so a missing R
fails there instead of skipping.
"""

from __future__ import annotations

import io
import os
import shutil
import subprocess

import pandas as pd
import pytest


def require_r(*packages: str) -> None:
    """Skip (or, with PLATELOOM_REQUIRE_R=1, fail) unless Rscript can load every one of ``packages``."""
    loads = "; ".join(f"suppressMessages(library({p}))" for p in packages) or "invisible(0)"
    found = shutil.which("Rscript") is not None and (
        subprocess.run(["Rscript", "-e", loads], capture_output=True, check=False).returncode == 0
    )
    if not found:
        if os.environ.get("PLATELOOM_REQUIRE_R") == "1":
            pytest.fail(f"PLATELOOM_REQUIRE_R=1 but Rscript with {', '.join(packages)} is not available")
        pytest.skip(f"R with {', '.join(packages)} is not installed (Debian r-cran-* packages)")


def run_r(script: str, data: pd.DataFrame) -> pd.DataFrame:
    """Run ``script`` with ``data`` as CSV on its stdin (read it with ``read.csv(file("stdin"))``);
    the script writes one CSV table to stdout, returned as a data frame."""
    result = subprocess.run(
        ["Rscript", "-e", script], input=data.to_csv(index=False), capture_output=True, text=True, check=True
    )
    return pd.read_csv(io.StringIO(result.stdout))
