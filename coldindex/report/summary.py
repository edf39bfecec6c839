"""The release's headline sentences and its report page, generated from the numbers."""

from __future__ import annotations

import re
from collections.abc import Mapping
from typing import TYPE_CHECKING, Any

import numpy as np
import pandas as pd

if TYPE_CHECKING:
    from coldindex.config import Config

WITHDRAWN_SHIFT = "provisional regime shift withdrawn"

CAUTIONS = ("These indicators are decision support. They rest on stated assumptions (a "
            "Gaussian, stationary bottom-temperature field around a constant mean or a depth "
            "trend; one variogram family for all years; AR(1) red noise for the shift and "
            "skill tests) and carry the uncertainty of interpolation and of the variogram's "
            "parameters, not of the choice of model or of the survey design. Where they feed "
            "management advice, defer to the responsible agency's reviewed assessment.")


def headlines(indices: pd.DataFrame, classes: pd.DataFrame, cuts: Mapping[str, Any],
              shifts: Any, skill: Any, proj: Any, revisions: pd.DataFrame, cfg: Config,
              skipped: Mapping[str, str]) -> list[str]:
    """Sentences generated from the numbers, for the terminal and the report.

    ``shifts``, ``skill`` and ``proj`` are the stages' runs
    (:class:`coldindex.pipeline.StageRun`), None when the stage did not run.
    """
    from coldindex.report.page import column_label

    sc = cfg.shifts
    ol = skill.result[2] if skill is not None else None

    out = []
    main = cfg.classify.columns[0]
    valid = indices.dropna(subset=[main])
    if len(valid):
        last = valid.iloc[-1]
        yr = int(last["year"])
        cls = classes[(classes["column"] == main) & (classes["year"] == yr)]["class"]
        colder = cuts[main].direction
        ranked = valid[main].rank(ascending=(colder == "lower"), method="min")
        rank = int(ranked.iloc[-1])
        unit = "°C" if main.endswith("_c") else "km²"
        text = (f"{yr} was a{'n' if str(cls.iloc[0]).startswith('a') else ''} "
                f"{cls.iloc[0]} year by {column_label(main).rsplit(' (', 1)[0]} "
                f"({last[main]:.3g} {unit}; the "
                f"{_ordinal(rank)} coldest of {len(valid)} years)")
        if len(valid) > 1:
            prev = valid.iloc[-2]
            text += (f", {last[main] - prev[main]:+.3g} {unit} from {int(prev['year'])}")
        out.append(text + ".")
    from coldindex.regimes import surviving

    sig = (surviving(shifts.files["shifts.csv"], sc.p_max) if shifts is not None
           else pd.DataFrame())
    if shifts is None:
        out.append(f"Regime shifts not tested: {skipped.get('shifts', 'stage skipped')}")
    elif len(sig):
        items = ", ".join(f"{r.method.upper()} {r.year} ({r.mean_before:.3g} -> "
                          f"{r.mean_after:.3g}, p = {r.p_value:.3f}"
                          f"{', provisional' if r.provisional else ''})"
                          for r in sig.itertuples())
        out.append(f"Regime shifts in {sc.column} that survive the red-noise test "
                   f"(p < {sc.p_max:g}): {items}.")
    else:
        out.append(f"No regime shift in {sc.column} survives the red-noise test "
                   f"(p < {sc.p_max:g}).")
    if ol is not None:
        from coldindex.skill import outlook_sentence

        out.append("Outlook: " + outlook_sentence(ol, cfg.skill.column))
    if proj is not None:
        out += proj.result.summaries
    gone = revisions["cause"].astype(str).str.startswith(WITHDRAWN_SHIFT)
    n_values = int((~gone).sum())
    out.append(f"{n_values} past values changed since the previous release."
               if n_values else "No past value changed since the previous release.")
    if gone.any():
        out.append(f"{int(gone.sum())} provisional regime shift(s) of the previous release "
                   "withdrawn (revisions.csv).")
    return out


def _ordinal(n: int) -> str:
    suffix = "th" if 10 <= n % 100 <= 20 else {1: "st", 2: "nd", 3: "rd"}.get(n % 10, "th")
    return f"{n}{suffix}"


def release_page(cfg: Config, indices: pd.DataFrame, classes: pd.DataFrame, shifts: Any,
                 skill: Any, proj: Any, revisions: pd.DataFrame, index: Any,
                 pngs: Mapping[str, bytes], headlines: list[str], prov: dict,
                 skipped: Mapping[str, str], release_name: str,
                 cuts: Mapping[str, Any]) -> str:
    """The release's report page (see :mod:`coldindex.report.page`)."""
    from coldindex.report import page as pg
    from coldindex.report.html import escape

    check, res = index.check, index.result
    skill_tab = skill.result[0] if skill is not None else None

    th = cfg.index.thresholds
    tt = pg.threshold_text(th)
    ok = indices.dropna(subset=["bottom_mean_c"])
    last_year = int(ok["year"].max()) if len(ok) else None
    m = re.match(r"\.?release-(\d+)", release_name)
    number = int(m.group(1)) if m else None
    date = (pg.median_date(check.qc.casts, last_year) if last_year is not None else None)
    subtitle = pg.subtitle_text(number, last_year, date)
    title = cfg.report.title + (f", {last_year} survey" if last_year is not None else "")
    cols = ["year", "n_casts", "median_doy", "coverage", "bottom_mean_c",
            *[c for c in indices.columns if c.startswith("below_") and c.count("_") == 2],
            "surface_mean_c", "timing_adjustment_c", "cv_rmse_c", "note"]
    series_cols = ", ".join(pg.column_label(c) for c in
                            ["bottom_mean_c", *[c for c in cfg.classify.columns
                                                if c.startswith("below_")][:1]])
    S = pg.Section
    sections = [S("indices", "Indices", pg.indices_paragraphs(indices, th),
                  pg.figure_html(pngs.get("series"), "index series",
                                 f"Series of {series_cols}: black line and markers, year "
                                 "classes by marker (cold ▼, average ●, warm ▲), 90 % "
                                 "interval shaded blue, reference mean ± 1 SD in grey, "
                                 "latest year ringed.")
                  + pg.details_table(indices[[c for c in cols if c in indices]],
                                     "survey years"))]
    if res is not None and res.regions is not None:
        reg = res.regions
        reg_cols = ["year", "region", "region_km2", "bottom_mean_c",
                    *[c for c in reg.columns if c.startswith("below_") and c.count("_") == 2],
                    "note"]
        shown = reg[reg["year"] == reg["year"].max()] if len(reg) else reg
        sections.append(S("regions", "Regions and depth zones",
                          pg.regions_paragraphs(reg, th, check.domain.area_km2
                                                if check.domain is not None else None),
                          pg.details_table(shown[[c for c in reg_cols if c in reg]],
                                           "regions", shown=len(shown))
                          + "<details><summary>Every year and region</summary>"
                          + pg.details_table(reg[[c for c in reg_cols if c in reg]],
                                             "rows", shown=len(reg))
                          + "</details>"))
    maps_body = pg.figure_html(pngs.get("maps"), "bottom-temperature maps",
                               "Kriged bottom temperature of every survey year with indices "
                               f"(smooth process, nugget filtered); black line: the {th[0]:g} "
                               "°C contour; dots: the casts used; dotted lines: latitude and "
                               "longitude; the bar gives the scale in km.")
    maps_body += pg.figure_html(pngs.get("anomalies"), "anomaly maps",
                                "Bottom temperature minus the mean map of the reference "
                                "period, latest years (°C): blue colder, orange warmer.")
    sections.append(S("maps", "Bottom-temperature maps",
                      [f"Maps of every year on one colour scale; the thresholds of the areas "
                       f"are {tt}. Mapped values are least certain far from the casts (see "
                       "the standard deviation in fields.nc)."], maps_body))
    cls_paras, cls_body = pg.classes_body(classes, cuts)
    sections.append(S("classes", "Year classes", cls_paras, cls_body))
    if shifts is not None:
        sections.append(S("shifts", "Regime shifts",
                          pg.shifts_paragraphs(shifts.files["shifts.csv"], cfg.shifts.p_max,
                                               cfg.shifts.column),
                          pg.details_table(shifts.files["shifts.csv"], "shifts")
                          + pg.details_table(shifts.files["regimes.csv"], "regimes")))
    if skill_tab is not None:
        sections.append(S("skill", "Ice skill and outlook",
                          ["Correlation of each winter-ice predictor with the target at each "
                           "lag, with effective-sample-size p-values and Benjamini-Hochberg "
                           "q-values (outlined when q < 0.1), then the cross-validated "
                           "hindcast against persistence and the outlook with its interval."],
                          pg.figure_html(pngs.get("skill"), "skill", "Correlation by "
                                         "predictor and lag (outlined: q < 0.1).")
                          + pg.figure_html(pngs.get("hindcast"), "hindcast",
                                           "Observed, hindcast and persistence, with the "
                                           "outlook and its interval.")
                          + pg.details_table(skill_tab.sort_values("q_value"),
                                             "predictor and lag pairs", newest_last=False)))
    if proj is not None:
        sections.append(S("projections", "Projections",
                          ["Probability of a cold year under each model and scenario after "
                           "bias adjustment, and the stop year: the first year from which "
                           "the chance of any cold year in the window, from the smooth "
                           "expectation and the fitted year-to-year noise, stays below the "
                           "stop probability.",
                           "The last cold year is different: the last year a member was "
                           "actually cold in its adjusted trajectory. A stop year after it "
                           "means cold years stayed possible for a while though none was "
                           "drawn; a stop year before it means a late cold year was an "
                           "unlikely draw under the fitted noise. Plan on the stop year and "
                           "its spread across models, not on one trajectory's last cold "
                           "year."],
                          pg.figure_html(pngs.get("projection"), "projection",
                                         "Probability of a cold year by model, one panel a "
                                         "scenario; ▼ marks stop years.")
                          + pg.figure_html(pngs.get("stop_years"), "stop years",
                                           "Stop year by model and scenario; open arrows "
                                           "mark censored models (no stop year by the end "
                                           "of the record, or never cold in it).")
                          + pg.details_table(proj.files["emergence.csv"],
                                             "models and scenarios",
                                             newest_last=False)))
    sections.append(S("revisions", "Revisions",
                      [f"{len(revisions)} past values changed since the previous release, "
                       "each with its cause (new casts, a changed setting, a new method)."
                       if len(revisions) else "No past value changed beyond the tolerance."],
                      pg.details_table(revisions, "revisions") if len(revisions) else ""))
    outliers = res.outliers if res is not None else pd.DataFrame()
    qc_counts = check.qc.table["flag"].value_counts().rename_axis("flag").reset_index(
        name="casts")
    qc_body = f"<p>Domain: {escape(check.domain_source)}.</p>" + pg.details_table(
        qc_counts, "flags", newest_last=False)
    if len(outliers):
        qc_body += pg.details_table(outliers, "spatial outliers", newest_last=False)
    sections.append(S("qc", "Quality control",
                      pg.qc_paragraphs(check.qc.table, outliers, cfg.index.outlier_z), qc_body))
    if skipped:
        sections.append(S("skipped", "Stages not run this year",
                          [f"{name}: {why}" for name, why in skipped.items()], ""))
    stages = ["index"] + (["shifts"] if shifts is not None else []) + (
        ["skill"] if skill_tab is not None else []) + (["project"] if proj is not None else [])
    sections.append(S("methods", "Methods", [pg.methods_paragraph(
        stages, with_drift=cfg.inputs.bathymetry is not None,
        with_sims=cfg.index.sims > 0 and cfg.index.method == "kriging",
        with_regions=res is not None and res.regions is not None,
        with_outliers=cfg.index.outlier_z > 0, with_timing=cfg.index.timing_drift)]))
    inputs = "".join(f"<li><code>{escape(k)}</code> sha256 {escape(v)}</li>"
                     for k, v in prov["inputs_sha256"].items())
    provenance = (f"<p>coldindex {escape(prov['version'])}; Python "
                  f"{escape(prov['versions']['python'])}, numpy "
                  f"{escape(prov['versions']['numpy'])}. Inputs:</p><ul>{inputs}</ul>"
                  "<p>The run time and per-output checksums are in provenance.json.</p>")
    return pg.render_page(title, subtitle, CAUTIONS, headlines, sections, provenance)


def release_figures(cfg: Config, indices: pd.DataFrame, classes: pd.DataFrame, shifts: Any,
                    index: Any, coast: Any = None) -> dict[str, Any]:
    """The release's own figures by name: series, maps and anomalies (``coast``: lines)."""
    from coldindex.config import parse_reference
    from coldindex.report import figures as fg
    from coldindex.report.page import column_label

    res, grid, domain = index.result, index.grid, index.domain
    figs: dict[str, Any] = {}
    ref_years = parse_reference(cfg.classify.reference)
    pairs = [("bottom_mean_c", column_label("bottom_mean_c"))]
    area_col = next((c for c in cfg.classify.columns if c.startswith("below_")), None)
    if area_col:
        pairs.append((area_col, column_label(area_col)))
    regimes = shifts.files["regimes.csv"] if shifts is not None else None
    figs["series"] = fg.series_figure(indices, pairs, classes, regimes, reference=ref_years)
    notes = indices["note"].astype(object).fillna("")
    ok_years = [y for y, note in zip(res.years, notes, strict=True)
                if not str(note).startswith("no indices")]
    idx = [res.years.index(y) for y in ok_years]
    outline = [np.asarray(r.coords) for p in getattr(domain.polygon_xy, "geoms",
                                                      [domain.polygon_xy])
               for r in [p.exterior]]
    cast_xy = [res.casts.loc[res.casts["year"] == y, ["x_km", "y_km"]].to_numpy()
               for y in ok_years]
    contour = cfg.index.thresholds[0]
    maps = grid.to_2d(res.estimate[idx])
    figs["maps"] = fg.maps_figure(ok_years, maps, grid.x, grid.y, outline, cast_xy, contour,
                                  lon=grid.lon, lat=grid.lat, coastline=coast)
    in_ref = [k for k, y in enumerate(ok_years)
              if ref_years is None or ref_years[0] <= y <= ref_years[1]]
    if len(in_ref) > 1:
        last = list(range(len(ok_years)))[-cfg.report.map_years:]
        stack = maps[in_ref]
        count = np.isfinite(stack).sum(axis=0)
        ref_map = np.where(count > 0, np.nansum(stack, axis=0) / np.maximum(count, 1), np.nan)
        figs["anomalies"] = fg.maps_figure(
            [ok_years[k] for k in last], maps[last] - ref_map, grid.x, grid.y, outline,
            [cast_xy[k] for k in last], None, lon=grid.lon, lat=grid.lat, coastline=coast,
            label="anomaly (°C)", anomaly=True)
    return figs
