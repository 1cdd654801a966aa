"""Settings from one source: the workflow's config schema holds every default.

Each stage's settings object is built by name from a validated config (``from_config``);
``defaults(**overrides)`` builds it from the schema's defaults alone, for tests and benchmarks.
Nothing else declares a default value of a config key.
"""

from __future__ import annotations

import copy
import dataclasses
from functools import lru_cache
from typing import Any, ClassVar, TypeVar

import yaml

from plateloom.assets import config_schema, demo_config_folder

T = TypeVar("T", bound="FromSchema")

# The fewest keys a config must give (the schema requires them); everything else has a default.
MINIMAL_CONFIG = {
    "screen_sheet": "",
    "images": {"filename_template": "{well}_s{site}_{channel}.tif"},
    "channels": [{"name": "nuclei", "role": "nuclei"}],
}


@lru_cache(maxsize=1)
def load_schema() -> dict:
    """The config schema (JSON schema written in YAML)."""
    with open(config_schema(), encoding="utf-8") as handle:
        return yaml.safe_load(handle)


def fill_defaults(config: dict) -> dict:
    """``config`` validated against the schema, with every missing key set to its schema default.

    Raises ``jsonschema.ValidationError`` for the first problem (``plateloom check`` lists them all).
    """
    from snakemake.utils import validate

    filled = copy.deepcopy(config)
    validate(filled, str(config_schema()), set_default=True)
    return filled


def _unknown_keys(error) -> list[str]:
    """Each unexpected key of an additionalProperties error, with the closest known key if any."""
    import difflib

    known = list(error.schema.get("properties", {}))
    where = ".".join(map(str, error.path))
    found = []
    for key in sorted(set(error.instance) - set(known)):
        close = difflib.get_close_matches(str(key), known, n=1, cutoff=0.6)
        name = f"{where}.{key}" if where else str(key)
        found.append(f"{name}: not a known key" + (f" (did you mean {close[0]}?)" if close else ""))
    return found


def config_problems(config: dict) -> list[str]:
    """Every way ``config`` breaks the schema, one short line each (key path: what is wrong), with the
    closest known key for a misspelt one; empty when the config is valid."""
    import jsonschema

    problems = []
    for error in sorted(jsonschema.Draft202012Validator(load_schema()).iter_errors(config), key=lambda e: list(e.path)):
        if error.validator == "additionalProperties" and isinstance(error.instance, dict):
            problems += _unknown_keys(error)
            continue
        where = ".".join(map(str, error.path)) or "top level"
        problems.append(f"{where}: {error.message if len(error.message) < 300 else error.message[:300] + '...'}")
    return problems


@lru_cache(maxsize=1)
def _schema_defaults() -> dict:
    return fill_defaults(MINIMAL_CONFIG)


def schema_defaults() -> dict:
    """A complete config of schema defaults (a fresh copy: callers may change it)."""
    return copy.deepcopy(_schema_defaults())


@lru_cache(maxsize=1)
def _demo_config() -> dict:
    with open(demo_config_folder() / "config.yaml", encoding="utf-8") as handle:
        return fill_defaults(yaml.safe_load(handle))


def demo_config() -> dict:
    """The demo screen's config (config/config.yaml), validated with every default filled (a copy)."""
    return copy.deepcopy(_demo_config())


class FromSchema:
    """Mixin of the settings dataclasses: built by name from one config section (``SECTION``;
    a class that reads several sections overrides ``from_config``), or from the schema's
    defaults with ``defaults(**overrides)``."""

    SECTION: ClassVar[str] = ""

    @classmethod
    def from_config(cls: type[T], config: dict) -> T:
        """From the validated config's ``SECTION`` (every key filled by the schema); keys of the
        section that are not fields of the class (e.g. plate.report_feature) are left out."""
        fields = {f.name for f in dataclasses.fields(cls)}
        return cls(**{k: v for k, v in config[cls.SECTION].items() if k in fields})

    @classmethod
    def defaults(cls: type[T], **overrides: Any) -> T:
        """The settings of a config that leaves every key at its schema default, then ``overrides`` by name."""
        return dataclasses.replace(cls.from_config(schema_defaults()), **overrides)

    @classmethod
    def of_demo(cls: type[T], **overrides: Any) -> T:
        """The settings of the demo screen's config, then ``overrides`` by name."""
        return dataclasses.replace(cls.from_config(demo_config()), **overrides)
