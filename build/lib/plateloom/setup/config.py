"""The config reference (Markdown) generated from the workflow's JSON schema: every key, type, default."""

from __future__ import annotations

import json

import yaml

from plateloom.assets import config_schema

SCHEMA = str(config_schema())


def _type(spec: dict) -> str:
    kind = spec.get("type", "object" if "properties" in spec else "")
    kinds = kind if isinstance(kind, list) else [kind]
    text = " or ".join(k for k in kinds if k)
    if "enum" in spec:
        text += " (" + ", ".join(map(str, spec["enum"])) + ")"
    bounds = [
        f"{op} {spec[key]}"
        for key, op in (("minimum", ">="), ("exclusiveMinimum", ">"), ("maximum", "<="))
        if key in spec
    ]
    return text + (" " + ", ".join(bounds) if bounds else "")


def _rows(properties: dict, prefix: str, required: set[str]) -> list[str]:
    rows = []
    for name, spec in properties.items():
        key = f"{prefix}{name}"
        default = (
            json.dumps(spec["default"], ensure_ascii=False)
            if "default" in spec
            else ("required" if name in required else "")
        )
        description = " ".join(str(spec.get("description", "")).split()).replace("|", "\\|")
        rows.append(f"| `{key}` | {_type(spec)} | {default.replace('|', chr(92) + '|')} | {description} |")
        if "properties" in spec:
            rows += _rows(spec["properties"], key + ".", set(spec.get("required", [])))
        items = spec.get("items", {})
        if isinstance(items, dict) and "properties" in items:
            rows += _rows(items["properties"], key + "[].", set(items.get("required", [])))
    return rows


def config_reference(schema_path: str = SCHEMA) -> str:
    """Markdown table of every config key (dotted path), its type and bounds, default and description."""
    with open(schema_path, encoding="utf-8") as handle:
        schema = yaml.safe_load(handle)
    lines = [
        "# Config reference",
        "",
        "Generated from `workflow/schemas/config.schema.yaml` by `plateloom config-reference`; do not edit by hand.",
        "Units are in the key names (`_um`, `_um2`, `_min`) or the descriptions.",
        "",
        "| key | type | default | description |",
        "|---|---|---|---|",
    ]
    lines += _rows(schema["properties"], "", set(schema.get("required", [])))
    return "\n".join(lines) + "\n"
