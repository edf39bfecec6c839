"""Figures (matplotlib): built here as Figure objects, saved by :mod:`coldindex.io.writers`.

The palette is our own and readable by colour-blind readers: a blue-to-orange
diverging map for correlations, and dark blue / orange / grey for cold / warm /
neutral series. Significance is shown by outline and hatching, so the figures
read in greyscale too.
"""

from __future__ import annotations

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402
import pandas as pd  # noqa: E402
from matplotlib.colors import LinearSegmentedColormap  # noqa: E402
from matplotlib.figure import Figure  # noqa: E402

COLD = "#1f4e79"
WARM = "#d9822b"
NEUTRAL = "#7f7f7f"
DIVERGING = LinearSegmentedColormap.from_list(
    "coldindex_diverging", ["#1f4e79", "#6a9ec6", "#f2f2f2", "#f0b46e", "#a4500f"])


def _plain(text: object) -> str:
    """Text from data, shown as written: ``$`` escaped so mathtext never reads it.

    A leading underscore (which hides a legend entry) is kept visible by a space.
    SVG output escapes XML itself; this guards the mathtext parser only.
    """
    out = str(text).replace("$", r"\$")
    return " " + out if out.startswith("_") else out


def skill_figure(table: pd.DataFrame, q_threshold: float = 0.1) -> Figure:
    """Correlation by predictor and lag, annotated; q < threshold outlined, others hatched.

    Parameters
    ----------
    table
        :func:`coldindex.skill.skill_table` output.
    q_threshold
        Benjamini-Hochberg q-value below which a cell counts as significant.

    Returns
    -------
    matplotlib.figure.Figure
        The figure.
    """
    preds = list(dict.fromkeys(table["predictor"]))
    lags = sorted(table["lag"].unique())
    R = table.pivot(index="predictor", columns="lag", values="r").reindex(preds)[lags]
    Q = table.pivot(index="predictor", columns="lag", values="q_value").reindex(preds)[lags]
    fig, ax = plt.subplots(figsize=(1.6 + 1.2 * len(lags), 0.9 + 0.45 * len(preds)))
    im = ax.imshow(R.to_numpy(float), cmap=DIVERGING, vmin=-1, vmax=1, aspect="auto")
    for i in range(len(preds)):
        for j in range(len(lags)):
            r, q = R.iat[i, j], Q.iat[i, j]
            sig = bool(np.isfinite(q) and q < q_threshold)
            ax.add_patch(plt.Rectangle((j - 0.5, i - 0.5), 1, 1, fill=False,
                                       hatch=None if sig else "///",
                                       edgecolor="black" if sig else "#9a9a9a",
                                       linewidth=2.2 if sig else 0.0))
            if np.isfinite(r):
                ax.text(j, i, f"{r:+.2f}", ha="center", va="center", fontsize=9,
                        color="white" if abs(r) > 0.6 else "black",
                        fontweight="bold" if sig else "normal")
    ax.set_xticks(range(len(lags)), [f"lag {lag}" for lag in lags])
    ax.set_yticks(range(len(preds)), [_plain(p.replace("ice_", "")) for p in preds])
    ax.set_title(f"Correlation of winter ice with the target\n(outlined: q < {q_threshold}; "
                 "hatched: not significant)", fontsize=10)
    fig.colorbar(im, ax=ax, label="correlation r", shrink=0.8)
    fig.tight_layout()
    return fig


def hindcast_figure(table: pd.DataFrame, outlook: dict, label: str) -> Figure:
    """Observed and hindcast series with the outlook point and its interval.

    Parameters
    ----------
    table
        Hindcast table (``year``, ``observed``, ``predicted``, ``persistence``).
    outlook
        :func:`coldindex.skill.outlook` output.
    label
        Y-axis label (column and unit).

    Returns
    -------
    matplotlib.figure.Figure
        The figure.
    """
    fig, ax = plt.subplots(figsize=(8, 3.8))
    ax.plot(table["year"], table["observed"], "-o", color="black", ms=3, lw=1.2,
            label="observed")
    ax.plot(table["year"], table["predicted"], "-s", color=COLD, ms=3, lw=1.2,
            label="hindcast (cross-validated)")
    ax.plot(table["year"], table["persistence"], ":", color=NEUTRAL, lw=1.2,
            label="persistence")
    cuts = outlook["cuts"]
    ax.axhspan(cuts["low"], cuts["high"], color="#e6e6e6", zorder=0, label="average class")
    ax.errorbar([outlook["year"]], [outlook["predicted"]],
                yerr=[[outlook["predicted"] - outlook["lo"]], [outlook["hi"] -
                                                                outlook["predicted"]]],
                fmt="D", color=WARM, ms=7, capsize=4,
                label=f"outlook {outlook['year']} ({outlook['confidence']:.0%} interval)")
    ax.set_xlabel("year")
    ax.set_ylabel(_plain(label))
    ax.legend(fontsize=8, ncol=3, loc="upper center", bbox_to_anchor=(0.5, -0.18),
              frameon=False)
    ax.grid(alpha=0.3)
    fig.tight_layout()
    return fig


def projection_figure(projection: pd.DataFrame, emergence: pd.DataFrame) -> Figure:
    """Probability of a cold year by model, one panel a scenario, stop years marked.

    Parameters
    ----------
    projection
        ``projection.csv`` as a frame.
    emergence
        ``emergence.csv`` as a frame.

    Returns
    -------
    matplotlib.figure.Figure
        The figure.
    """
    scenarios = sorted(projection["scenario"].unique())
    models = sorted(projection["model"].unique())
    styles = ["-", "--", "-.", ":"]
    shades = [COLD, WARM, "#4d4d4d", "#6a9ec6", "#a4500f", "#9a9a9a"]
    fig, axes = plt.subplots(1, len(scenarios), figsize=(4.6 * len(scenarios), 3.6),
                             sharey=True, squeeze=False)
    for ax, scen in zip(axes[0], scenarios, strict=True):
        for k, model in enumerate(models):
            g = projection[(projection["scenario"] == scen) & (projection["model"] == model)]
            g = g.groupby("year")["p_cold"].mean()
            colour = shades[k % len(shades)]
            ax.plot(g.index, g.to_numpy(), styles[k % len(styles)], color=colour, lw=1.4,
                    label=_plain(model))
            row = emergence[(emergence["scenario"] == scen) & (emergence["model"] == model)]
            if len(row) and row["stopped"].iloc[0]:
                sy = int(row["stop_year"].iloc[0])
                ax.axvline(sy, color=colour, lw=0.8, ls=styles[k % len(styles)], alpha=0.7)
                ax.plot([sy], [g.get(sy, np.nan)], "v", color=colour, ms=6)
        ax.set_title(_plain(f"scenario {scen}"), fontsize=10)
        ax.set_xlabel("year")
        ax.grid(alpha=0.3)
    axes[0][0].set_ylabel("probability of a cold year")
    axes[0][-1].legend(fontsize=8, frameon=False, title="model (▼ stop year)",
                       title_fontsize=8)
    fig.tight_layout()
    return fig


CLASS_COLOURS = {"cold": COLD, "average": "#bdbdbd", "warm": WARM}


def _short(v: float) -> str:
    """A value for a label: whole numbers from 100 up, 0 for tiny values, else 3 digits."""
    if abs(v) >= 100:
        return f"{v:,.0f}"
    return "0" if abs(v) < 5e-4 else f"{v:.3g}"


def series_figure(indices: pd.DataFrame, columns: list[tuple[str, str]],
                  classes: pd.DataFrame | None = None,
                  regimes: pd.DataFrame | None = None,
                  reference: tuple[int, int] | None = None) -> Figure:
    """Index series with 90 % bands, year classes, regime means, reference band, latest year.

    Parameters
    ----------
    indices
        ``indices.csv`` as a frame.
    columns
        ``(column, label)`` pairs, one panel each; the label is shown as written.
    classes
        Tidy classes (``column``, ``year``, ``class``), optional.
    regimes
        ``regimes.csv`` of the first column (``method``, ``start``, ``end``, ``mean``), optional.
    reference
        Reference period ``(first, last)`` for the mean ± 1 SD band; None uses every year.

    Returns
    -------
    matplotlib.figure.Figure
        The figure.
    """
    fig, axes = plt.subplots(len(columns), 1, figsize=(8.5, 2.7 * len(columns)), sharex=True,
                             squeeze=False)
    for k, (ax, (col, label)) in enumerate(zip(axes[:, 0], columns, strict=True)):
        y = indices["year"].to_numpy()
        v = indices[col].to_numpy(float)
        inside = np.isfinite(v) if reference is None else (
            np.isfinite(v) & (y >= reference[0]) & (y <= reference[1]))
        if inside.sum() > 1:
            mu, sd = float(np.mean(v[inside])), float(np.std(v[inside], ddof=1))
            span = ("all years" if reference is None
                    else f"{reference[0]}-{reference[1]}")
            ax.axhspan(mu - sd, mu + sd, color="#eeeeee", zorder=0,
                       label=f"reference mean ± 1 SD ({span})")
            ax.axhline(mu, color=NEUTRAL, lw=0.8, ls=":", zorder=1)
        if f"{col}_lo90" in indices:
            ax.fill_between(y, indices[f"{col}_lo90"], indices[f"{col}_hi90"], color="#c6dbef",
                            label="90 % interval", step=None, zorder=1)
        ax.plot(y, v, "-", color="black", lw=1.0, zorder=2)
        if classes is not None:
            c = classes[classes["column"] == col].set_index("year")["class"]
            for cls, colour in CLASS_COLOURS.items():
                yrs = [yr for yr in y if c.get(yr, "") == cls]
                vals = indices.set_index("year").loc[yrs, col]
                ax.scatter(yrs, vals, s=28, color=colour, edgecolor="black", linewidths=0.4,
                           zorder=3, marker={"cold": "v", "average": "o", "warm": "^"}[cls],
                           label=cls)
        if np.isfinite(v).any():
            last = int(np.flatnonzero(np.isfinite(v))[-1])
            ax.scatter([y[last]], [v[last]], s=140, facecolor="none", edgecolor=WARM,
                       linewidths=2.0, zorder=5, label=f"latest ({y[last]})")
            ax.annotate(_short(float(v[last])), (y[last], v[last]), xytext=(6, 6),
                        textcoords="offset points", fontsize=8, color="#7a3b00")
        if regimes is not None and k == 0:
            for _, r in regimes[regimes["method"] == "stars"].iterrows():
                ax.hlines(r["mean"], r["start"] - 0.5, r["end"] + 0.5, color=WARM, lw=2.0,
                          linestyles="--", zorder=4)
        ax.set_ylabel(_plain(label))
        ax.grid(alpha=0.3)
    axes[0, 0].legend(fontsize=7, ncol=4, frameon=False, loc="lower left",
                      bbox_to_anchor=(0.0, 1.0))
    axes[-1, 0].set_xlabel("survey year")
    if regimes is not None:
        axes[-1, 0].set_title("dashed: STARS regime means", fontsize=8, loc="right")
    fig.tight_layout()
    return fig


def _nice_step(span: float, target: int = 4) -> float:
    """A round step (1, 2 or 5 times a power of ten) giving about ``target`` intervals."""
    raw = max(span, 1e-9) / target
    p = 10 ** np.floor(np.log10(raw))
    return float(min((m * p for m in (1, 2, 5, 10)), key=lambda s: abs(s - raw)))


def _graticule(ax, grid_x: np.ndarray, grid_y: np.ndarray, lon: np.ndarray,
               lat: np.ndarray) -> None:
    """Lines of equal longitude and latitude, labelled in degrees."""
    lon = np.asarray(lon, float)
    centre = float(np.degrees(np.angle(np.nanmean(np.exp(1j * np.radians(lon))))))
    lon_u = (lon - centre + 180.0) % 360.0 - 180.0 + centre  # no jump at the antimeridian
    for field, hemi in ((lon_u, "EW"), (np.asarray(lat, float), "NS")):
        lo, hi = float(np.nanmin(field)), float(np.nanmax(field))
        step = _nice_step(hi - lo, 3)
        levels = np.arange(np.ceil(lo / step) * step, hi + 1e-9, step)
        if len(levels) == 0:
            continue
        cs = ax.contour(grid_x, grid_y, field, levels=levels, colors="#555555",
                        linewidths=0.4, linestyles=":")

        def fmt(v: float, hemi: str = hemi) -> str:
            w = (v + 180.0) % 360.0 - 180.0 if hemi == "EW" else v
            letter = hemi[0] if w >= 0 else hemi[1]
            if hemi == "EW" and abs(abs(w) - 180.0) < 1e-9:
                letter = ""
            return f"{abs(w):g}°{letter}"

        ax.clabel(cs, fmt=fmt, fontsize=6, inline=True)


def _scale_bar(ax, grid_x: np.ndarray, grid_y: np.ndarray) -> None:
    """A scale bar of a round length in the lower left corner (the plane is in km)."""
    width = float(grid_x.max() - grid_x.min())
    length = _nice_step(width, 4)
    x0 = float(grid_x.min()) + 0.05 * width
    y0 = float(grid_y.min()) + 0.05 * float(grid_y.max() - grid_y.min())
    ax.plot([x0, x0 + length], [y0, y0], color="black", lw=2.5, solid_capstyle="butt")
    ax.text(x0 + length / 2, y0, f"{length:g} km", ha="center", va="bottom", fontsize=7)


def maps_figure(years: list[int], fields: np.ndarray, grid_x: np.ndarray, grid_y: np.ndarray,
                outline: list[np.ndarray], casts: list[np.ndarray],
                contour: float | None = 2.0, *, lon: np.ndarray | None = None,
                lat: np.ndarray | None = None, coastline: list[np.ndarray] | None = None,
                label: str = "bottom temperature (°C)", anomaly: bool = False,
                ncols: int = 4) -> Figure:
    """Small multiples of a mapped field, one panel a year, on one colour scale.

    Parameters
    ----------
    years
        The years shown.
    fields
        Maps on the grid, (len(years), ny, nx), NaN outside the domain. [°C]
    grid_x, grid_y
        Cell-centre axes in the equal-area plane. [km]
    outline
        Domain outline rings, (k, 2) arrays in the same plane. [km]
    casts
        Cast positions per year, (n, 2) arrays. [km]
    contour
        Temperature of the drawn contour [°C]; None draws none.
    lon, lat
        Longitude and latitude of the cell centres, (ny, nx): a graticule is drawn
        when given. [degrees]
    coastline
        Coastline lines, (k, 2) arrays in the equal-area plane [km], drawn in grey.
    label
        Colour-bar label, with its unit.
    anomaly
        A diverging colour scale centred on zero.
    ncols
        Panels per row.

    Returns
    -------
    matplotlib.figure.Figure
        The figure.
    """
    n = len(years)
    cols = max(1, min(n, ncols))
    rows = int(np.ceil(n / cols))
    aspect = float(np.ptp(grid_y)) / max(float(np.ptp(grid_x)), 1e-9)
    panel = 2.4
    fig, axes = plt.subplots(rows, cols, figsize=(panel * cols + 1.2,
                                                  panel * aspect * rows + 0.6),
                             squeeze=False, sharex=True, sharey=True, layout="compressed")
    finite = fields[np.isfinite(fields)]
    if anomaly:
        m = float(np.percentile(np.abs(finite), 99)) if finite.size else 1.0
        vmin, vmax, cmap = -max(m, 1e-6), max(m, 1e-6), DIVERGING
    else:
        vmin, vmax = (float(np.percentile(finite, 1)), float(np.percentile(finite, 99))) \
            if finite.size else (0.0, 1.0)
        cmap = LinearSegmentedColormap.from_list(
            "coldindex_temperature", ["#0b2c4d", "#2f6a9e", "#8fb9d8", "#f3e6c5", "#e3a054",
                                      "#9c3d0b"])
    im = None
    for k, (ax, yr, f, xy) in enumerate(zip(axes.ravel(), years, fields, casts, strict=False)):
        im = ax.pcolormesh(grid_x, grid_y, f, cmap=cmap, vmin=vmin, vmax=vmax, shading="auto",
                           rasterized=True)
        if contour is not None and np.nanmin(f) < contour < np.nanmax(f):
            ax.contour(grid_x, grid_y, f, levels=[contour], colors="black", linewidths=1.0)
        for line in coastline or []:
            ax.plot(line[:, 0], line[:, 1], color="#6b6b6b", lw=0.7)
        for ring in outline:
            ax.plot(ring[:, 0], ring[:, 1], color="#333333", lw=0.8)
        if len(xy):
            ax.plot(xy[:, 0], xy[:, 1], ".", color="black", ms=1.0)
        if lon is not None and lat is not None:
            _graticule(ax, grid_x, grid_y, lon, lat)
        if k == 0:
            _scale_bar(ax, grid_x, grid_y)
        ax.set_xlim(float(grid_x.min()), float(grid_x.max()))
        ax.set_ylim(float(grid_y.min()), float(grid_y.max()))
        ax.set_title(str(yr), fontsize=9, pad=2)
        ax.set_aspect("equal")
        ax.set_xticks([])
        ax.set_yticks([])
    for ax in axes.ravel()[n:]:
        ax.axis("off")
    if im is not None:
        text = _plain(label) + (f"; black line: {contour:g} °C" if contour is not None else "")
        fig.colorbar(im, ax=axes.ravel().tolist(), shrink=0.8, label=text)
    return fig


def stop_year_figure(emergence: pd.DataFrame, end_year: int | None = None) -> Figure:
    """Stop years by model (rows) and scenario (markers); censored ones marked.

    A model whose cold years have not stopped by the end of its record is drawn as
    an open arrow at the record's end (right-censored, "not by the end"); one
    never cold in its record as an open arrow at the start (left-censored).

    Parameters
    ----------
    emergence
        ``emergence.csv`` as a frame.
    end_year
        Last year of the trajectories (where right-censored models are drawn);
        None uses the latest stop year or last cold year shown.

    Returns
    -------
    matplotlib.figure.Figure
        The figure.
    """
    scenarios = sorted(emergence["scenario"].astype(str).unique())
    models = list(dict.fromkeys(emergence["model"].astype(str)))
    models = [m for m in models if m != "ensemble median"] + (
        ["ensemble median"] if "ensemble median" in models else [])
    markers = ["o", "s", "D", "^", "v", "P"]
    shades = [COLD, WARM, "#4d4d4d", "#6a9ec6", "#a4500f", "#9a9a9a"]
    years = pd.concat([pd.to_numeric(emergence[c], errors="coerce")
                       for c in ("stop_year", "last_cold_year", "calibration_start")
                       if c in emergence]).dropna()
    lo = float(years.min()) if len(years) else 2000.0
    hi = float(end_year) if end_year is not None else (float(years.max()) if len(years)
                                                        else lo + 50)
    fig, ax = plt.subplots(figsize=(8.0, 0.6 + 0.42 * max(len(models), 1)))
    offsets = np.linspace(-0.2, 0.2, len(scenarios)) if len(scenarios) > 1 else [0.0]
    for j, scen in enumerate(scenarios):
        colour, mk = shades[j % len(shades)], markers[j % len(markers)]
        first = True
        for i, model in enumerate(models):
            row = emergence[(emergence["scenario"].astype(str) == scen)
                            & (emergence["model"].astype(str) == model)]
            if row.empty:
                continue
            r = row.iloc[0]
            yv = i + offsets[j]
            state = str(r.get("state", ""))
            lab = _plain(f"scenario {scen}") if first else None
            if state == "stopped" and pd.notna(r["stop_year"]):
                ax.plot([float(r["stop_year"])], [yv], mk, color=colour, ms=7, label=lab)
            elif state == "never_cold":
                ax.plot([lo], [yv], "<", mfc="white", mec=colour, ms=8, label=lab)
            else:
                ax.plot([hi], [yv], ">", mfc="white", mec=colour, ms=8, label=lab)
            if pd.notna(r.get("last_cold_year")):
                ax.plot([float(r["last_cold_year"])], [yv], "|", color=colour, ms=9, mew=1.5)
            first = False
    ax.set_yticks(range(len(models)), [_plain(m) for m in models])
    ax.invert_yaxis()
    ax.set_xlabel("year")
    ax.grid(axis="x", alpha=0.3)
    ax.set_title("filled: stop year; |: last cold year; open ▶: no stop year by the end of "
                 "the record; open ◀: never cold in the record", fontsize=8)
    ax.legend(fontsize=8, frameon=False, loc="lower left", bbox_to_anchor=(1.0, 0.0))
    fig.tight_layout()
    return fig
