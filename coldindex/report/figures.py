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
    ax.set_yticks(range(len(preds)), [p.replace("ice_", "") for p in preds])
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
    ax.set_ylabel(label)
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
                    label=model)
            row = emergence[(emergence["scenario"] == scen) & (emergence["model"] == model)]
            if len(row) and row["stopped"].iloc[0]:
                sy = int(row["stop_year"].iloc[0])
                ax.axvline(sy, color=colour, lw=0.8, ls=styles[k % len(styles)], alpha=0.7)
                ax.plot([sy], [g.get(sy, np.nan)], "v", color=colour, ms=6)
        ax.set_title(f"scenario {scen}", fontsize=10)
        ax.set_xlabel("year")
        ax.grid(alpha=0.3)
    axes[0][0].set_ylabel("probability of a cold year")
    axes[0][-1].legend(fontsize=8, frameon=False, title="model (▼ stop year)",
                       title_fontsize=8)
    fig.tight_layout()
    return fig
