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


def series_figure(indices: pd.DataFrame, columns: list[tuple[str, str]],
                  classes: pd.DataFrame | None = None,
                  regimes: pd.DataFrame | None = None) -> Figure:
    """Index series with 90 % bands, year classes as coloured markers, regime means.

    Parameters
    ----------
    indices
        ``indices.csv`` as a frame.
    columns
        ``(column, label)`` pairs, one panel each.
    classes
        Tidy classes (``column``, ``year``, ``class``), optional.
    regimes
        ``regimes.csv`` of the first column (``method``, ``start``, ``end``, ``mean``), optional.

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
        if f"{col}_lo90" in indices:
            ax.fill_between(y, indices[f"{col}_lo90"], indices[f"{col}_hi90"], color="#c6dbef",
                            label="90 % interval", step=None)
        ax.plot(y, v, "-", color="black", lw=1.0, zorder=2)
        if classes is not None:
            c = classes[classes["column"] == col].set_index("year")["class"]
            for cls, colour in CLASS_COLOURS.items():
                yrs = [yr for yr in y if c.get(yr, "") == cls]
                vals = indices.set_index("year").loc[yrs, col]
                ax.scatter(yrs, vals, s=28, color=colour, edgecolor="black", linewidths=0.4,
                           zorder=3, marker={"cold": "v", "average": "o", "warm": "^"}[cls],
                           label=cls)
        if regimes is not None and k == 0:
            for _, r in regimes[regimes["method"] == "stars"].iterrows():
                ax.hlines(r["mean"], r["start"] - 0.5, r["end"] + 0.5, color=WARM, lw=2.0,
                          linestyles="--", zorder=4)
        ax.set_ylabel(_plain(label))
        ax.grid(alpha=0.3)
    axes[0, 0].legend(fontsize=8, ncol=4, frameon=False, loc="upper left")
    axes[-1, 0].set_xlabel("year")
    if regimes is not None:
        axes[0, 0].set_title("dashed: STARS regime means", fontsize=9, loc="right")
    fig.tight_layout()
    return fig


def maps_figure(years: list[int], fields: np.ndarray, grid_x: np.ndarray, grid_y: np.ndarray,
                outline: list[np.ndarray], casts: list[np.ndarray],
                contour: float = 2.0) -> Figure:
    """Small multiples of the kriged bottom temperature for some years.

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
        Temperature of the drawn contour. [°C]

    Returns
    -------
    matplotlib.figure.Figure
        The figure.
    """
    n = len(years)
    cols = min(n, 2)
    rows = int(np.ceil(n / cols))
    fig, axes = plt.subplots(rows, cols, figsize=(5.2 * cols, 3.4 * rows), squeeze=False)
    finite = fields[np.isfinite(fields)]
    vmin, vmax = (float(np.percentile(finite, 1)), float(np.percentile(finite, 99))) \
        if finite.size else (0.0, 1.0)
    cmap = LinearSegmentedColormap.from_list(
        "coldindex_temperature", ["#0b2c4d", "#2f6a9e", "#8fb9d8", "#f3e6c5", "#e3a054",
                                  "#9c3d0b"])
    im = None
    for ax, yr, f, xy in zip(axes.ravel(), years, fields, casts, strict=False):
        im = ax.pcolormesh(grid_x, grid_y, f, cmap=cmap, vmin=vmin, vmax=vmax, shading="auto",
                           rasterized=True)
        if np.nanmin(f) < contour < np.nanmax(f):
            ax.contour(grid_x, grid_y, f, levels=[contour], colors="black", linewidths=1.2)
        for ring in outline:
            ax.plot(ring[:, 0], ring[:, 1], color="#333333", lw=0.8)
        ax.plot(xy[:, 0], xy[:, 1], ".", color="black", ms=1.5)
        ax.set_title(str(yr), fontsize=10)
        ax.set_aspect("equal")
        ax.set_xticks([])
        ax.set_yticks([])
    for ax in axes.ravel()[n:]:
        ax.axis("off")
    if im is not None:
        fig.colorbar(im, ax=axes.ravel().tolist(), shrink=0.8,
                     label=f"bottom temperature (°C); black line: {contour:g} °C")
    return fig
