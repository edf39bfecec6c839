"""The annual report page: sections with generated paragraphs, rendered by a Jinja2 template.

Every value from data or settings passes through the template's autoescaping or
through :func:`coldindex.report.html.escape` / :func:`coldindex.report.html.table_html`;
only markup built by those helpers is marked safe. The page is self-contained
(images as data URIs, no script, no network) and carries no run time.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field

import jinja2
import numpy as np
import pandas as pd
from markupsafe import Markup

from coldindex.report.html import STYLE, data_uri, escape, table_html

#: Where the methods and the output columns are documented (shipped with the source).
DOCS_URL = "docs/methods.md and docs/outputs.md in the coldindex source distribution"

EXTRA_STYLE = """
nav ol{columns:2;font-size:.9em}
.lead{color:#333}
figure{margin:.8em 0}
figcaption{font-size:.85em;color:#444;margin-top:.3em}
.scroll{overflow-x:auto;max-width:100%}
details{margin:.4em 0 1em}
summary{cursor:pointer;color:#1f4e79}
.subtitle{color:#555;margin-top:-.6em}
.cuts td,.cuts th{text-align:left}
"""

TEMPLATE = """<!DOCTYPE html>
<html lang="en"><head><meta charset="utf-8">
<meta name="viewport" content="width=device-width, initial-scale=1">
<title>{{ title }}</title><style>{{ style }}</style></head><body>
<h1>{{ title }}</h1>
<p class="subtitle">{{ subtitle }}</p>
<p class="caution">{{ cautions }}</p>
<nav><ol>{% for s in sections %}<li><a href="#{{ s.key }}">{{ s.heading }}</a></li>{% endfor %}
</ol></nav>
<section id="headlines"><h2>Headlines</h2><ul class="headline">
{% for h in headlines %}<li>{{ h }}</li>{% endfor %}</ul></section>
{% for s in sections %}<section id="{{ s.key }}"><h2>{{ s.heading }}</h2>
{% for p in s.paragraphs %}<p class="lead">{{ p }}</p>{% endfor %}
{{ s.body }}</section>
{% endfor %}
<section id="provenance"><h2>Provenance</h2>{{ provenance }}</section>
</body></html>
"""


@dataclass
class Section:
    """One section of the page.

    Attributes
    ----------
    key
        Anchor id (also what the browser test looks for).
    heading
        Heading text.
    paragraphs
        Generated plain-text paragraphs (escaped by the template).
    body
        Trusted markup built with :func:`figure_html`, :func:`details_table` and the
        :mod:`coldindex.report.html` helpers.
    """

    key: str
    heading: str
    paragraphs: list[str] = field(default_factory=list)
    body: str = ""


def figure_html(png: bytes | None, alt: str, caption: str) -> str:
    """A figure with its caption (empty when the figure was not made)."""
    if png is None:
        return ""
    return (f'<figure><img alt="{escape(alt)}" src="{data_uri(png)}">'
            f"<figcaption>{escape(caption)}</figcaption></figure>")


def details_table(df: pd.DataFrame, what: str, shown: int = 12, digits: int = 3,
                  newest_last: bool = True) -> str:
    """A short table, with the full table behind a disclosure element when longer.

    Parameters
    ----------
    df
        The table.
    what
        What the rows are, e.g. ``survey years`` (used in the summary line).
    shown
        Rows shown outright (the newest when ``newest_last``, else the first).
    digits
        Significant digits of numbers.
    newest_last
        Whether the newest rows are at the end.
    """
    df = df.copy()
    for c in df.columns:  # areas in whole km² (no 3.9e-06 km² from a far tail)
        if str(c).endswith("_km2") and pd.api.types.is_float_dtype(df[c]):
            df[c] = df[c].round(0)
    if len(df) <= shown:
        return f'<div class="scroll">{table_html(df, digits, max_rows=len(df) + 1)}</div>'
    part = df.tail(shown) if newest_last else df.head(shown)
    which = "latest" if newest_last else "first"
    return (f'<div class="scroll">{table_html(part, digits, max_rows=shown)}</div>'
            f"<details><summary>All {len(df)} {escape(what)} (the table above shows the "
            f"{which} {shown})</summary><div class=\"scroll\">"
            f"{table_html(df, digits, max_rows=len(df) + 1)}</div></details>")


def threshold_text(thresholds: Sequence[float]) -> str:
    """``2 °C and 0 °C`` from the thresholds."""
    items = [f"{t:g} °C" for t in thresholds]
    return items[0] if len(items) == 1 else ", ".join(items[:-1]) + " and " + items[-1]


def column_label(col: str) -> str:
    """A plain label with its unit for an index column (``below_2c_km2`` -> words)."""
    from coldindex.schema import threshold_from_column

    if col == "bottom_mean_c":
        return "mean bottom temperature (°C)"
    if col == "surface_mean_c":
        return "mean surface temperature (°C)"
    if col.startswith("surface_") and col.endswith("c_km2"):
        t = threshold_from_column("below_" + col.split("_", 2)[2])
        side = col.split("_")[1]
        if t is not None:
            return f"sea-surface area {side} {t:g} °C (km²)"
    t = threshold_from_column(col)
    if t is not None and col.startswith("below_"):
        return f"area below {t:g} °C (km²)"
    if t is not None and col.startswith("above_"):
        return f"area above {t:g} °C (km²)"
    unit = " (°C)" if col.endswith("_c") else " (km²)" if col.endswith("_km2") else ""
    return col.replace("_", " ") + unit


def _fmt(v: float, unit: str) -> str:
    """A value with its unit: areas in whole km², temperatures to 3 digits."""
    if unit == "km²" or abs(v) >= 1000:
        return f"{v:,.0f} {unit}"
    return f"{v:.3g} {unit}"


def indices_paragraphs(indices: pd.DataFrame, thresholds: Sequence[float]) -> list[str]:
    """What the indices table shows, the latest year's values and what is uncertain."""
    from coldindex.schema import area_column

    ok = indices.dropna(subset=["bottom_mean_c"])
    out = [f"{len(indices)} survey years from {int(indices['year'].min())} to "
           f"{int(indices['year'].max())}; {len(ok)} have indices (a year with too few casts "
           "or too little coverage gets a blank and a note, never an extrapolation)."]
    if len(ok):
        last = ok.iloc[-1]
        text = f"In {int(last['year'])} the mean bottom temperature was " \
               f"{last['bottom_mean_c']:.2f} °C"
        if "bottom_mean_c_lo90" in ok and pd.notna(last.get("bottom_mean_c_lo90")):
            text += (f" (90 % interval {last['bottom_mean_c_lo90']:.2f} to "
                     f"{last['bottom_mean_c_hi90']:.2f} °C)")
        parts = []
        for t in thresholds:
            c = area_column(t)
            if c in ok and pd.notna(last[c]):
                p = f"{_fmt(float(last[c]), 'km²')} below {t:g} °C"
                if f"{c}_lo90" in ok and pd.notna(last.get(f"{c}_lo90")):
                    p += (f" ({_fmt(float(last[c + '_lo90']), 'km²')} to "
                          f"{_fmt(float(last[c + '_hi90']), 'km²')})")
                parts.append(p)
        if parts:
            text += "; expected areas: " + "; ".join(parts)
        out.append(text + ".")
    if "timing_adjustment_c" in ok and len(ok) and pd.notna(ok.iloc[-1]["timing_adjustment_c"]):
        last = ok.iloc[-1]
        out.append(f"Maps and indices are adjusted to one reference survey day (survey-day "
                   f"drift): in {int(last['year'])} the field changed by "
                   f"{last['timing_rate_c_per_day']:+.3g} °C a day during the survey, and the "
                   f"adjustment moved the year's mean by {last['timing_adjustment_c']:+.2f} °C "
                   "(timing_adjustment_c per year in indices.csv).")
    out.append("Areas are expected areas under the kriging model (cell area times the "
               "probability of being below the threshold); the _map columns are the areas of "
               "the kriged map. The 90 % intervals come from conditional simulations spread "
               "over draws of the variogram parameters: they include interpolation and "
               "variogram uncertainty, not survey-design, timing or instrument bias.")
    return out


def regions_paragraphs(regions: pd.DataFrame, thresholds: Sequence[float],
                       domain_km2: float | None = None) -> list[str]:
    """How to read the regions table (and how much of the domain no region holds)."""
    from coldindex.schema import area_column

    names = list(dict.fromkeys(regions["region"]))
    ok = regions.dropna(subset=["bottom_mean_c"])
    out = [f"Every index for {len(names)} regions and depth zones ({', '.join(names)}), from "
           "the same kriging and the same conditional simulations as the domain's: regions "
           "that cover the domain add up to it in every simulation, so their intervals are "
           "consistent with the domain's."]
    if domain_km2 and len(regions):
        first = regions[regions["year"] == regions["year"].min()]
        zone = first["region"].astype(str).str.match(r"depth \S+-\S+ m$")
        for kind, part in (("region", first[~zone]), ("depth zone", first[zone])):
            if len(part):
                left = domain_km2 - float(part["region_km2"].sum())
                if left > 1e-6 * domain_km2:
                    out.append(f"{left:,.0f} km² of the domain ({left / domain_km2:.1%}) lies "
                               f"outside every {kind}, so the {kind}s do not add up to the "
                               "domain.")
    if len(ok):
        yr = int(ok["year"].max())
        g = ok[ok["year"] == yr]
        c = area_column(thresholds[0])
        if c in g and g[c].notna().any():
            top = g.loc[g[c].idxmax()]
            out.append(f"In {yr} the largest expected area below {thresholds[0]:g} °C was in "
                       f"{top['region']} ({_fmt(float(top[c]), 'km²')} of "
                       f"{_fmt(float(top['region_km2']), 'km²')}).")
    return out


def classes_body(classes: pd.DataFrame, cuts: Mapping[str, object]) -> tuple[list[str], str]:
    """Paragraphs and markup: the cut values beside the classes."""
    rows = []
    for col, c in cuts.items():
        low, high = float(c.low), float(c.high)  # type: ignore[attr-defined]
        lower = c.direction == "lower"  # type: ignore[attr-defined]
        rule = str(getattr(c, "rule", ""))
        ref = getattr(c, "reference", None) or ("given" if rule == "given" else "whole record")

        def num(v: float, col: str = col) -> str:
            return f"{v:,.0f}" if col.endswith("_km2") else f"{v:.3g}"

        rows.append({"column": col, "label": column_label(col),
                     "cold": f"< {num(low)}" if lower else f"> {num(high)}",
                     "average": f"{num(low)} to {num(high)}",
                     "warm": f"> {num(high)}" if lower else f"< {num(low)}",
                     "rule": rule, "reference": ref})
    cut_table = pd.DataFrame(rows)
    wide = classes.pivot(index="year", columns="column", values="class").reset_index()
    paras = ["Each year is cold, average or warm by where its value falls against the cut "
             "values below (a value equal to a cut is average). A value close to a cut, "
             "within its 90 % interval, could fall in the neighbouring class: the class "
             "probabilities are in classes.csv and covariates.csv."]
    body = (f'<div class="scroll cuts">{table_html(cut_table, max_rows=len(cut_table) + 1)}</div>'
            + details_table(wide, "survey years"))
    return paras, body


def shifts_paragraphs(shifts: pd.DataFrame, p_max: float, column: str) -> list[str]:
    """How to read the shifts tables."""
    n = int((shifts["p_value"] < p_max).sum()) if len(shifts) else 0
    return [f"Shifts in {column_label(column)} found by STARS and by penalised change points, "
            f"each with a p-value from a red-noise (AR(1)) bootstrap of the whole detection; "
            f"{n} of {len(shifts)} survive p < {p_max:g}. A shift in the last years is "
            "provisional: the next surveys can confirm or withdraw it."]


def qc_paragraphs(qc: pd.DataFrame, outliers: pd.DataFrame, z_max: float) -> list[str]:
    """What quality control removed and why."""
    n = len(qc)
    bad = qc[qc["flag"] != "ok"]
    out = [f"{n} input rows; {n - len(bad)} passed the value checks and {len(bad)} were "
           "flagged (every flag with its reason is in qc.csv; flagged casts are never used)."]
    if len(outliers):
        out.append(f"{len(outliers)} cast{'s' if len(outliers) > 1 else ''} failed the spatial "
                   f"check (leave-one-out standardized residual |z| > {z_max:g} against the "
                   "year's variogram fit, noisy variance) and "
                   f"{'were' if len(outliers) > 1 else 'was'} kept out of the refit and the "
                   "maps; they are listed below.")
    elif z_max > 0:
        out.append(f"No cast failed the spatial check (|z| > {z_max:g}).")
    return out


def methods_paragraph(stages: Sequence[str], with_drift: bool, with_sims: bool,
                      with_regions: bool, with_outliers: bool, with_timing: bool = False
                      ) -> str:
    """Methods text naming only the stages that ran (plain text)."""
    drifts = [d for d, on in (("depth", with_drift), ("survey-day", with_timing)) if on]
    parts = [(f"Kriging with a {' and '.join(drifts)} drift" if drifts else "Ordinary kriging")
             + " of each year's casts on a fixed equal-area grid, variograms fitted by "
             "restricted maximum likelihood (Isaaks & Srivastava 1989; Cressie 1993), "
             "leave-one-out cross-validation (Dubrule 1983)"]
    if with_outliers:
        parts.append("a spatial-outlier check on the leave-one-out standardized residuals "
                     "(fit, flag, refit)")
    if with_sims:
        parts.append("conditional simulation by circulant embedding (Dietrich & Newsam 1997) "
                     "over draws of the variogram parameters")
    if with_regions:
        parts.append("regions and depth zones summarised from the same simulations")
    if "shifts" in stages:
        parts.append("STARS (Rodionov 2004) and PELT (Killick et al. 2012) with a red-noise "
                     "bootstrap of the whole detection")
    if "skill" in stages:
        parts.append("ice skill with Bretherton et al. (1999) effective sample sizes, "
                     "Benjamini & Hochberg (1995) q-values and Williams' t (Steiger 1980)")
    if "project" in stages:
        parts.append("bias adjustment of model trajectories by quantile delta mapping "
                     "(Cannon et al. 2015)")
    return ("Methods used in this release: " + "; ".join(parts) + ". Details and "
            f"assumptions: {DOCS_URL}.")


def subtitle_text(release: int | None, survey_year: int | None, survey_date: str | None) -> str:
    """``Release 3 · survey 2025 (median cast date 2025-01-24)``."""
    bits = []
    if release is not None:
        bits.append(f"Release {release}")
    if survey_year is not None:
        bits.append(f"survey {survey_year}"
                    + (f" (median cast date {survey_date})" if survey_date else ""))
    return " · ".join(bits)


def median_date(casts: pd.DataFrame, year: int) -> str | None:
    """Median cast date of a survey year as ISO text (from ``doy``), or None without dates."""
    doy = casts.loc[casts["year"] == year, "doy"].dropna()
    if doy.empty:
        return None
    day = int(np.floor(float(doy.median())))
    return (pd.Timestamp(year=year, month=1, day=1) + pd.Timedelta(days=day - 1)).strftime(
        "%Y-%m-%d")


def render_page(title: str, subtitle: str, cautions: str, headlines: Sequence[str],
                sections: Sequence[Section], provenance: str) -> str:
    """Render the page from its sections (autoescaped; bodies are trusted markup).

    Returns
    -------
    str
        The complete HTML document.
    """
    env = jinja2.Environment(autoescape=True, undefined=jinja2.StrictUndefined,
                             keep_trailing_newline=True)
    tpl = env.from_string(TEMPLATE)
    safe = [Section(s.key, s.heading, list(s.paragraphs), Markup(s.body))  # noqa: S704
            for s in sections]
    return tpl.render(title=title, subtitle=subtitle, cautions=cautions, headlines=headlines,
                      sections=safe, provenance=Markup(provenance),  # noqa: S704
                      style=Markup(STYLE + EXTRA_STYLE))  # noqa: S704
