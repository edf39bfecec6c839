"""The assessor's covariate table: each index, its uncertainty, z-score, lags, regions, classes."""

from __future__ import annotations

import re

import numpy as np
import pandas as pd

from coldindex.classify import reference_values
from coldindex.errors import InputError


def covariates_table(indices: pd.DataFrame, columns: tuple[str, ...], lags: tuple[int, ...],
                     reference: tuple[int, int] | None) -> pd.DataFrame:
    """The assessor's covariates: each index, its uncertainty, its z-score and lagged copies.

    ``<col>_lag1`` on the row of year Y holds the value of year Y - 1 (aligned by year,
    so a missing year gives a blank, never a shifted value).
    """
    t = indices.set_index("year")
    years = np.arange(int(t.index.min()), int(t.index.max()) + 1)
    t = t.reindex(years)
    out: dict[str, np.ndarray] = {"year": years}  # one frame at the end: no fragmentation
    for col in columns:
        if col not in t.columns:
            raise InputError(f"covariates.columns names {col!r}, which indices.csv does not "
                             f"have; choose among {', '.join(c for c in t.columns if c)}.")
        v = t[col].to_numpy(float)
        out[col] = v
        for s in ("_sd", "_lo90", "_hi90"):
            if col + s in t.columns:
                out[col + s] = t[col + s].to_numpy(float)
        ref = reference_values(years, v, reference)
        sd = float(np.std(ref, ddof=1)) if len(ref) > 1 else float("nan")
        out[col + "_z"] = ((v - float(np.mean(ref))) / sd if sd > 0
                           else np.full(len(years), np.nan))
    for col in columns:
        for lag in lags:
            out[f"{col}_lag{lag}"] = pd.Series(out[col], index=years).reindex(
                years - lag).to_numpy()
            out[f"{col}_z_lag{lag}"] = pd.Series(out[col + "_z"],
                                                 index=years).reindex(years - lag).to_numpy()
    return pd.DataFrame(out)


def region_slug(name: str) -> str:
    """A region or zone name as a column prefix (``east south`` -> ``east_south``)."""
    slug = re.sub(r"[^0-9a-z]+", "_", name.lower()).strip("_")
    return slug if slug and not slug[0].isdigit() else f"r_{slug}"


def with_region_columns(indices: pd.DataFrame, regions: pd.DataFrame | None,
                        columns: tuple[str, ...]) -> tuple[pd.DataFrame, tuple[str, ...]]:
    """Indices widened by each region's copy of the covariate columns, and their names.

    Region ``east south``'s ``bottom_mean_c`` becomes ``east_south_bottom_mean_c`` (with
    its ``_sd``/``_lo90``/``_hi90``), so the assessor picks a region's covariates by name.
    """
    if regions is None or regions.empty:
        return indices, columns
    slugs = {n: region_slug(n) for n in regions["region"].unique()}
    if len(set(slugs.values())) < len(slugs):
        raise InputError("Two region names give the same column prefix in covariates.csv "
                         f"({', '.join(sorted(slugs))}); rename one of them.")
    wide = indices.set_index("year").copy()
    names = list(columns)
    extra: dict[str, np.ndarray] = {}
    for name, slug in slugs.items():
        g = regions[regions["region"] == name].set_index("year")
        for col in columns:
            for s in ("", "_sd", "_lo90", "_hi90"):
                if col + s in g.columns:
                    extra[f"{slug}_{col}{s}"] = g[col + s].reindex(wide.index).to_numpy(float)
            if col in g.columns:
                names.append(f"{slug}_{col}")
    wide = pd.concat([wide, pd.DataFrame(extra, index=wide.index)], axis=1)
    return wide.reset_index(), tuple(names)


def with_class_probabilities(cov: pd.DataFrame, classes: pd.DataFrame) -> pd.DataFrame:
    """Covariates with each classified column's class probabilities (``<col>_p_cold``, ...)."""
    if classes.empty or "p_cold" not in classes.columns:
        return cov
    out = cov.set_index("year").copy()  # copy: covariates_table's frame is fragmented
    extra: dict[str, np.ndarray] = {}
    for col, g in classes.groupby("column", sort=False):
        g = g.set_index("year")
        for p in ("p_cold", "p_average", "p_warm"):
            if g[p].notna().any():
                extra[f"{col}_{p}"] = g[p].reindex(out.index).to_numpy(float)
    return pd.concat([out, pd.DataFrame(extra, index=out.index)], axis=1).reset_index()
