"""Self-contained HTML pages: inline CSS, figures as inline PNG, every text escaped."""

from __future__ import annotations

import base64
import html
import io
import json

import matplotlib

matplotlib.use("Agg")
# Text from layouts and configs (condition, batch) is drawn as given: never parsed as TeX-like math.
matplotlib.rcParams["text.parse_math"] = False
import matplotlib.pyplot as plt  # noqa: E402
import pandas as pd  # noqa: E402

from plateloom.assets import resource  # noqa: E402

STYLE_PATH = resource("report", "style.css")

CAUTIONS = (
    "plateloom is a research tool. Its results need experimental confirmation and are not for clinical "
    "or diagnostic decisions. The statistics assume the design declared in the screen sheet and layouts "
    "(wells as experimental units, random imaging-day and plate offsets); if the real design differs, "
    "the intervals do not hold."
)


def escape(text: object) -> str:
    """HTML-escape any value for use in text or attributes."""
    return html.escape(str(text), quote=True)


def figure_tag(figure: plt.Figure, alt: str) -> str:
    """Render a matplotlib figure as an inline PNG <img> and close it."""
    buffer = io.BytesIO()
    figure.savefig(buffer, format="png", dpi=90, bbox_inches="tight", metadata={"Software": None})
    plt.close(figure)
    data = base64.b64encode(buffer.getvalue()).decode()
    return f'<img alt="{escape(alt)}" src="data:image/png;base64,{data}">'


def write_figure(figure: plt.Figure, path: str) -> None:
    """Save a figure as PNG atomically (temporary file, then rename) and close it."""
    from plateloom.io.tables import atomic_path

    try:
        with atomic_path(path) as tmp:
            figure.savefig(tmp, format="png", dpi=110, bbox_inches="tight", metadata={"Software": None})
    finally:
        plt.close(figure)


def table_tag(frame: pd.DataFrame, float_format: str = "{:.4g}") -> str:
    """An HTML table of ``frame`` with every cell escaped."""
    formatted = frame.copy()
    for column in formatted.columns:
        if pd.api.types.is_float_dtype(formatted[column]):
            formatted[column] = formatted[column].map(lambda v: "" if pd.isna(v) else float_format.format(v))
    return formatted.to_html(index=False, escape=True, border=0)


def page(title: str, sections: list[tuple[str, str]], provenance: dict) -> str:
    """A complete HTML document: title, the cautions, sections (heading, HTML body), provenance."""
    with open(STYLE_PATH, encoding="utf-8") as handle:
        style = handle.read()
    body = "".join(f"<h2>{escape(heading)}</h2>\n{content}\n" for heading, content in sections)
    meta = escape(json.dumps(provenance, sort_keys=True))
    return (
        f'<!DOCTYPE html>\n<html lang="en"><head><meta charset="utf-8"><title>{escape(title)}</title>'
        f"<style>{style}</style></head><body>\n<h1>{escape(title)}</h1>\n"
        f'<p class="caution">{escape(CAUTIONS)}</p>\n{body}'
        f'<h2>Provenance</h2><p class="meta">{meta}</p>\n</body></html>\n'
    )
