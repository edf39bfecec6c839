"""One year's conditional simulations, summarised per realization.

The intervals of the domain's and the regions' indices come from these summaries:
``options.sims`` conditional realizations a year, spread over ``options.param_draws``
variograms drawn from the fit's posterior, each summarised as means and areas below the
thresholds without keeping the realizations (:func:`simulate_summaries`). Used by the
per-year work of :mod:`coldindex.indices` and by the dense path of :mod:`coldindex.dense`.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray
from scipy.spatial.distance import cdist

from coldindex.config import IndexOptions
from coldindex.domain import Grid
from coldindex.fitting import Fit, draw_variograms, with_posterior
from coldindex.interpolate import (
    DrawCache,
    Kriging,
    conditional_realizations,
    share_of,
    weighted_summaries,
)
from coldindex.regions import node_weights

FloatArray = NDArray[np.float64]


@dataclass
class SimSummaries:
    """Per-realization summaries of one year's conditional simulations.

    Attributes
    ----------
    means
        Domain mean per realization, (n,). [°C]
    areas
        Domain area below each threshold per realization, (n, t). [km²]
    method
        ``circulant``, ``exact`` or ``circulant+exact``.
    note
        A note for the year (empty when nothing to say).
    region_means
        Mean of each region per realization, (n, r); NaN for a region with no
        area. [°C]
    region_areas
        Area of each region below each threshold per realization, (n, r, t);
        from the same realizations as ``areas``. [km²]
    """

    means: FloatArray
    areas: FloatArray
    method: str
    note: str
    region_means: FloatArray
    region_areas: FloatArray


def simulate_summaries(kr: Kriging, fit: Fit, xy: FloatArray, z: FloatArray,
                       drift: FloatArray | None, grid: Grid, cell_xy: FloatArray,
                       cell_area: FloatArray, drift_cells: FloatArray | None,
                       options: IndexOptions, rng: np.random.Generator,
                       region_w: FloatArray | None = None,
                       dist_budget: int = 2**22) -> SimSummaries:
    """Per-realization domain and region means and areas, over variogram parameter draws.

    ``options.param_draws`` variograms are drawn from the fit's posterior
    (:func:`coldindex.fitting.draw_variograms`); each gets an equal share of the
    ``options.sims`` realizations, kriged with its own parameters. With no draws
    (or a ``wls`` fit) every realization uses the point estimate. Regions are
    summarised from the very same realizations as the domain: their cell weights
    are summed onto the simulation nodes (``node_of_cell``) when the exact
    fallback simulates on blocks, so regions that cover the domain add up to it
    realization by realization.

    Parameters
    ----------
    region_w
        Area of each active cell inside each region, (r, m) [km²]; None for none.
    dist_budget
        Most cells x casts distances kept for all draws (default 2**22, 32 MB); larger
        grids form them block by block in each draw.

    Returns
    -------
    SimSummaries
        Domain and region summaries per realization, method and note.
    """
    n = options.sims
    k = min(options.param_draws, n)
    if k > 0 and fit.method not in ("wls", "fixed"):  # no posterior to draw from
        fit = with_posterior(fit, xy, z, drift)
        draws = draw_variograms(fit, k, rng)
    else:
        draws = [fit.variogram]
    counts = np.full(len(draws), n // len(draws))
    counts[: n % len(draws)] += 1
    # The cells x casts distances serve every draw; above the budget each draw forms them
    # block by block instead (same numbers, less memory).
    dist = cdist(cell_xy, xy) if len(cell_xy) * len(xy) <= dist_budget else None
    rw = np.zeros((0, len(cell_area))) if region_w is None else np.asarray(region_w, float)
    means, areas, methods, coarse = [], [], set(), set()
    rmeans, rareas = [], []
    # Draws repeat points of the posterior grid: what they share is computed once.
    keys = [(vg.family, vg.len_scale, share_of(vg)) for vg, c in zip(draws, counts, strict=True)
            if c > 0]
    cache = DrawCache()
    for vg, c in zip(draws, counts, strict=True):
        if c == 0:
            continue
        keys.pop(0)
        cache.keep = set(keys)
        kd = kr if vg == kr.vg else Kriging(xy, z, vg, drift)
        real = conditional_realizations(kd, grid.x, grid.y, grid.mask, cell_area, int(c), rng,
                                        drift_cells, cell_dist=dist, cache=cache)
        cache.prune()
        # The domain and the regions in one pass over the realizations (domain first).
        w = np.vstack([real.node_area[None, :],
                       node_weights(rw, real.node_of_cell, len(real.node_area))])
        mu, ar = weighted_summaries(real.values, w, options.thresholds)
        means.append(mu[:, 0])
        areas.append(ar[:, 0, :])
        rmeans.append(mu[:, 1:])
        rareas.append(ar[:, 1:, :])
        methods.add(real.method)
        if real.method == "exact":
            coarse.add(real.node_km)
    method = "+".join(sorted(methods)) if len(methods) > 1 else methods.pop()
    note = ""
    if coarse:
        note = ("simulated exactly (long length scale: circulant embedding would clip)"
                + (f" on {max(coarse):.3g} km blocks" if max(coarse) > grid.cell_km + 1e-9
                   else ""))
    return SimSummaries(means=np.concatenate(means), areas=np.concatenate(areas),
                        method=method, note=note,
                        region_means=np.concatenate(rmeans), region_areas=np.concatenate(rareas))
