"""Self-contained HTML pages: inline CSS, figures as inline PNG, every text escaped."""

from __future__ import annotations

import base64
import html
import io
import json
import re

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


def figure_tag(figure: plt.Figure, alt: str, trim: bool = True) -> str:
    """Render a matplotlib figure as an inline PNG <img> and close it. ``trim`` cuts the figure to
    what is drawn (one more drawing pass); figures that set their own margins pass False."""
    buffer = io.BytesIO()
    figure.savefig(buffer, format="png", dpi=90, bbox_inches="tight" if trim else None, metadata={"Software": None})
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


LONG_CELL_CHARACTERS = 40


def table_tag(frame: pd.DataFrame, float_format: str = "{:.4g}") -> str:
    """An HTML table of ``frame`` with every cell escaped."""
    formatted = frame.copy()
    for column in formatted.columns:
        if pd.api.types.is_float_dtype(formatted[column]):
            formatted[column] = formatted[column].map(lambda v: "" if pd.isna(v) else float_format.format(v))
    with pd.option_context("display.max_colwidth", None):  # notes in full, never cut with "..."
        html_table = formatted.to_html(index=False, escape=True, border=0)
    # short cells stay on one line (the table scrolls sideways in its frame); long text wraps in a wide cell
    return re.sub(rf"<td>([^<]{{{LONG_CELL_CHARACTERS},}})</td>", r'<td class="long">\1</td>', html_table)


def folded(summary: str, body: str) -> str:
    """``body`` behind a line the reader clicks to open (an HTML details element, closed)."""
    return f"<details><summary>{escape(summary)}</summary>{body}</details>"


def linked_cells(table_html: str, links: dict[str, str]) -> str:
    """``table_html`` with every cell whose whole text is a key of ``links`` made a link to its value."""
    for text, href in links.items():
        for cell in ("<td>", '<td class="long">'):
            table_html = table_html.replace(
                f"{cell}{escape(text)}</td>", f'{cell}<a href="{escape(href)}">{escape(text)}</a></td>'
            )
    return table_html


def anchor(heading: str) -> str:
    """The id of a section heading: lower case, words joined by '-' (letters and digits only)."""
    words = "".join(c.lower() if c.isalnum() else " " for c in heading).split()
    return "-".join(words) or "section"


def page(title: str, sections: list[tuple[str, str]], provenance: dict) -> str:
    """A complete HTML document from the page template (Jinja2, every text escaped): title, the
    cautions, a table of contents, sections (heading, HTML body built by the report modules),
    provenance; tables sortable and filterable by an inline script (nothing fetched)."""
    import jinja2

    folder = STYLE_PATH.parent
    environment = jinja2.Environment(
        loader=jinja2.FileSystemLoader(str(folder)), autoescape=True, keep_trailing_newline=True
    )
    return environment.get_template("page.html").render(
        title=title,
        cautions=CAUTIONS,
        style=(folder / "style.css").read_text(encoding="utf-8"),
        script=TABLES_SCRIPT_PATH.read_text(encoding="utf-8"),
        sections=[{"heading": h, "anchor": anchor(h), "body": body} for h, body in sections],
        provenance=json.dumps(provenance, sort_keys=True, indent=1),
    )
