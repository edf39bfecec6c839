"""One self-contained HTML page: images embedded as data URIs, no network, no run time.

The page is built from the release's numbers; headline sentences are generated,
not written by hand, so they always match the tables.
"""

from __future__ import annotations

import base64
import html
from collections.abc import Sequence

import pandas as pd

STYLE = """
body{font-family:system-ui,-apple-system,'Segoe UI',sans-serif;max-width:980px;margin:2em auto;
padding:0 1em;color:#1a1a1a;line-height:1.45}
h1{font-size:1.6em;border-bottom:3px solid #1f4e79;padding-bottom:.2em}
h2{font-size:1.2em;color:#1f4e79;margin-top:1.8em}
.caution{background:#fdf3e7;border-left:4px solid #d9822b;padding:.6em 1em}
.headline li{margin:.3em 0}
table{border-collapse:collapse;font-size:.85em;margin:.6em 0}
th,td{border-bottom:1px solid #ddd;padding:.25em .6em;text-align:right}
th{background:#f2f2f2}
td:first-child,th:first-child{text-align:left}
img{max-width:100%;height:auto;border:1px solid #eee}
code{background:#f4f4f4;padding:0 .2em}
"""


def escape(text: object) -> str:
    """Any text from data or settings, made inert in HTML.

    ``<``, ``>``, ``&`` and both quotes are escaped (no element or attribute can be
    opened), and braces too, so a value can never form a ``{{figure:NAME}}``
    placeholder.
    """
    return html.escape(str(text), quote=True).replace("{", "&#123;").replace("}", "&#125;")


def data_uri(png: bytes) -> str:
    """Base64 data URI of a PNG image."""
    return "data:image/png;base64," + base64.b64encode(png).decode("ascii")


def table_html(df: pd.DataFrame, digits: int = 3, max_rows: int = 60) -> str:
    """An HTML table of a frame (numbers rounded, at most ``max_rows`` rows)."""
    shown = df.tail(max_rows)

    def fmt(v: object) -> str:
        if isinstance(v, float):
            if v != v:
                return ""
            return f"{v:,.0f}" if abs(v) >= 1000 else f"{v:.{digits}g}"
        return escape(v) if v is not None and v is not pd.NA else ""

    head = "".join(f"<th>{escape(c)}</th>" for c in shown.columns)
    body = "".join("<tr>" + "".join(f"<td>{fmt(v)}</td>" for v in row) + "</tr>"
                   for row in shown.itertuples(index=False, name=None))
    return f"<table><thead><tr>{head}</tr></thead><tbody>{body}</tbody></table>"


def render(title: str, headlines: Sequence[str], sections: Sequence[tuple[str, str]],
           figures: dict[str, bytes], cautions: str, provenance: str) -> str:
    """Assemble the page.

    Parameters
    ----------
    title
        Page title.
    headlines
        Generated headline sentences.
    sections
        ``(heading, html)`` pairs; ``{{figure:NAME}}`` inside is replaced by that figure.
        The html is trusted markup: build it with :func:`escape` and :func:`table_html`
        around every value from data or settings.
    figures
        PNG bytes by name.
    cautions
        The cautions paragraph (plain text).
    provenance
        Provenance summary (HTML).

    Returns
    -------
    str
        The complete HTML document.
    """
    parts = [
        "<!DOCTYPE html>", '<html lang="en"><head><meta charset="utf-8">',
        f"<title>{escape(title)}</title><style>{STYLE}</style></head><body>",
        f"<h1>{escape(title)}</h1>",
        f'<p class="caution">{escape(cautions)}</p>',
        '<h2>Headlines</h2><ul class="headline">',
        *[f"<li>{escape(h)}</li>" for h in headlines], "</ul>",
    ]
    for heading, body in sections:
        for name, png in figures.items():
            body = body.replace("{{figure:" + name + "}}",
                                f'<img alt="{escape(name)}" src="{data_uri(png)}">')
        parts.append(f"<h2>{escape(heading)}</h2>{body}")
    parts += [f"<h2>Provenance</h2>{provenance}", "</body></html>"]
    return "\n".join(parts) + "\n"
