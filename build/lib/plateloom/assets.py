"""Where the shipped files are: the workflow, the demo config and the resources.

They are found through ``importlib.resources``, so a wheel installed anywhere finds them as an
editable install of the checkout does (``workflow/``, ``config/`` and ``resources/`` are mapped
into the package as ``plateloom.workflow``, ``plateloom.demo_config`` and ``plateloom.resources``).
"""

from __future__ import annotations

from importlib import resources
from pathlib import Path


def _package_folder(package: str) -> Path:
    return Path(str(resources.files(package)))


def workflow_folder() -> Path:
    """The folder holding the workflow's Snakefile, rules, schemas and entry scripts."""
    return _package_folder("plateloom.workflow")


def snakefile() -> Path:
    """The workflow's Snakefile."""
    return workflow_folder() / "Snakefile"


def config_schema() -> Path:
    """The JSON schema (YAML) of config.yaml: every key, type, default and unit."""
    return workflow_folder() / "schemas" / "config.schema.yaml"


def resource(*parts: str) -> Path:
    """A shipped resource, e.g. ``resource("report", "style.css")``."""
    return _package_folder("plateloom.resources").joinpath(*parts)


def demo_scenario() -> Path:
    """The demo screen's scenario (planted truth of the invented screen)."""
    return resource("demo", "scenario.yaml")


def demo_config_folder() -> Path:
    """The demo screen's config folder (config.yaml, plates.csv, layouts/)."""
    return _package_folder("plateloom.demo_config")
