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
TABLES_SCRIPT_PATH = resource("report", "tables.js")  # sorting and filtering, inline (no network)

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
    with pd.option_context("display.max_colwidth", None):  # notes in full, never cut with "..."
        return formatted.to_html(index=False, escape=True, border=0)


def anchor(heading: str) -> str:
    """The id of a section heading: lower case, words joined by '-' (letters and digits only)."""
    words = "".join(c.lower() if c.isalnum() else " " for c in heading).split()
    return "-".join(words) or "section"


def page(title: str, sections: list[tuple[str, str]], provenance: dict) -> str:
    """A complete HTML document: title, the cautions, a table of contents, sections (heading, HTML
    body), provenance; tables sortable and filterable by an inline script (nothing fetched)."""
    with open(STYLE_PATH, encoding="utf-8") as handle:
        style = handle.read()
    with open(TABLES_SCRIPT_PATH, encoding="utf-8") as handle:
        script = handle.read()
    headings = [heading for heading, _ in sections] + ["Provenance"]
    contents = "".join(f'<li><a href="#{anchor(h)}">{escape(h)}</a></li>' for h in headings)
    body = "".join(f'<h2 id="{anchor(heading)}">{escape(heading)}</h2>\n{content}\n' for heading, content in sections)
    meta = escape(json.dumps(provenance, sort_keys=True, indent=1))
    return (
        f'<!DOCTYPE html>\n<html lang="en"><head><meta charset="utf-8"><title>{escape(title)}</title>'
        f"<style>{style}</style></head><body>\n<h1>{escape(title)}</h1>\n"
        f'<p class="caution">{escape(CAUTIONS)}</p>\n'
        f'<nav class="contents"><ol>{contents}</ol></nav>\n{body}'
        f'<h2 id="provenance">Provenance</h2><pre class="meta">{meta}</pre>\n'
        f"<script>{script}</script>\n</body></html>\n"
    )
