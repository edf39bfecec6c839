"""Dense surveys and fine grids: local-neighbourhood kriging and simulations in blocks.

Exact kriging factors one ``n x n`` system a year (:class:`coldindex.interpolate.Kriging`),
which costs ``O(n^3)`` time and four ``n x n`` matrices of memory: about 3 GB at
10,000 casts. Above :data:`DENSE_THRESHOLD` casts a year, :func:`make_kriging`
returns :class:`LocalKriging` instead, with the same interface:

* **Drift.** The drift coefficients ``beta`` (constant, plus external drift) are
  the generalised-least-squares estimate over all casts, with ``K^-1`` replaced by
  Vecchia's sparse approximation (:func:`vecchia_whitener`); their covariance is
  the approximate ``(F^T K^-1 F)^-1``.
* **Estimate and variance.** Targets are grouped in square tiles; a tile's
  neighbourhood is the union of the ``neighbours`` nearest casts of each of its
  targets, so every target is kriged from at least its own nearest casts. The
  estimate is simple kriging of the residuals ``z - F beta`` from the tile's
  neighbourhood, plus ``f0^T beta``; the variance is the simple-kriging variance
  plus ``u^T Cov(beta) u``, ``u = f0 - F_N^T K_N^-1 c``, the same decomposition as
  universal kriging's (Cressie 1993, sect. 3.4), with the drift estimated once
  for the whole year rather than in each neighbourhood (a moving neighbourhood
  with a global drift, Chilès & Delfiner 2012, ch. 3).
* **Leave-one-out.** Dubrule's closed form inside each neighbourhood: the error of
  predicting cast i from the other casts of its neighbourhood, ``(K_N^-1 r)_i /
  (K_N^-1)_ii`` with ``r = z - F beta``, and its variance ``1 / (K_N^-1)_ii``.
* **Variogram fit.** :func:`fit_year` fits REML (or the chosen method) to a
  subsample of :data:`FIT_SUBSAMPLE` casts, spread over the survey with close pairs
  (:func:`fit_subsample`); parameter draws for the simulations come from the same
  subsample's restricted-likelihood posterior.

Conditional simulations for dense surveys and fine grids run in blocks of cells
(:func:`simulate_blocked`): the unconditional field comes from the same circulant
embedding as :func:`coldindex.interpolate.conditional_realizations`, the kriging of
the simulated cast values is done tile by tile, and every realization's means and
areas are summed block by block, so realizations x cells are never held at once.
Where the embedding would clip, exact kriging falls back to the exact Cholesky
simulation on blocks of cells (as the serial path does); local kriging grows the
embedding up to :data:`DENSE_PAD_CAP` and, if it still clips, reports the share.

References
----------
Cressie, N. (1993). Statistics for Spatial Data, revised edition. Wiley, sect. 3.4.
Chilès, J.-P. & Delfiner, P. (2012). Geostatistics: Modeling Spatial Uncertainty,
2nd edition. Wiley, ch. 3 (moving neighbourhoods).
Dubrule, O. (1983). Cross validation of kriging in a unique neighborhood.
Mathematical Geology 15, 687-699.
Stein, M. L., Chi, Z. & Welty, L. J. (2004). Approximating likelihoods for large
spatial data sets. J. R. Stat. Soc. B 66, 275-296 (fits to subsets of the data).
Diggle, P. & Lophaven, S. (2006). Bayesian geostatistical design. Scand. J. Stat.
33, 53-64 (lattice plus close pairs designs).
Vecchia, A. V. (1988). Estimation and model identification for continuous spatial
processes. J. R. Stat. Soc. B 50, 297-312.
Guinness, J. (2018). Permutation and grouping methods for sharpening Gaussian
process approximations. Technometrics 60, 415-429.
Journel, A. G. & Huijbregts, C. J. (1978). Mining Geostatistics. Academic Press,
ch. VII (conditioning by kriging).
"""

from __future__ import annotations

import hashlib
from collections.abc import Iterator
from dataclasses import dataclass

import numpy as np
import scipy.linalg as sla
from numpy.typing import ArrayLike, NDArray
from scipy.spatial import cKDTree
from scipy.spatial.distance import cdist

from coldindex.errors import TooFewDataError
from coldindex.fitting import Fit, draw_variograms, fit_variogram, fixed_fit, with_posterior
from coldindex.interpolate import (
    CLIP_TOLERANCE,
    Kriging,
    Variogram,
    _cast_stencils,
    circulant_embedding,
    conditional_realizations,
    drift_matrix,
    refinement,
    unconditional_fields,
    weighted_summaries,
)

FloatArray = NDArray[np.float64]
IntArray = NDArray[np.int_]

#: Casts a year above which :func:`make_kriging` uses :class:`LocalKriging` and
#: :func:`fit_year` a subsample. Measured (benchmarks/bench_dense.py year --threshold, a
#: whole year on the sample's domain and 5 km grid with 200 simulations): exact and local
#: cost the same at 1,000 casts (9.6 and 10.3 s; 294 and 224 MB), local is cheaper above
#: (1,500 casts: 27 and 18 s; 2,000: 66 and 20 s, 486 and 254 MB).
DENSE_THRESHOLD = 1000
#: Nearest casts every target is kriged from (at least; a tile's neighbourhood is the union).
NEIGHBOURS = 128
#: Largest subsample a dense year's variogram is fitted to (:func:`fit_subsample`).
FIT_SUBSAMPLE = 1500
#: Largest embedding size relative to the grid tried by local kriging before reporting clipping.
DENSE_PAD_CAP = 6.0
#: Realizations x cells above which simulations are summarised block by block. [values]
BLOCKED_VALUES = 20_000_000
_TILE_TARGETS = 4096  # most targets in one tile of a prediction (bounds the tile's matrices)


def stratified_subsample(xy: ArrayLike, size: int) -> IntArray:
    """A spatially stratified subsample of about ``size`` casts (all when there are fewer).

    The casts' bounding box is cut into square strata, shrunk until about ``size``
    strata hold a cast; each such stratum contributes the cast nearest its centre
    (ties broken by position), so the choice does not depend on row order.

    Parameters
    ----------
    xy
        Cast positions, (n, 2). [km]
    size
        Wanted subsample size.

    Returns
    -------
    numpy.ndarray
        Sorted indices of the chosen casts.
    """
    xy = np.asarray(xy, float)
    n = len(xy)
    if n <= size:
        return np.arange(n)
    lo = xy.min(axis=0)
    span = np.maximum(np.ptp(xy, axis=0), 1e-9)
    side = float(np.sqrt(span[0] * span[1] / size)) or float(max(span) / size)
    for _ in range(60):
        cell = np.floor((xy - lo) / side).astype(np.int64)
        key = cell[:, 0] * (int(span[1] / side) + 2) + cell[:, 1]
        if len(np.unique(key)) >= 0.95 * size:
            break
        side *= 0.95
    centre = lo + (cell + 0.5) * side
    dist = np.hypot(*(xy - centre).T)
    order = np.lexsort((xy[:, 1], xy[:, 0], dist, key))
    first = np.ones(n, bool)
    first[1:] = key[order][1:] != key[order][:-1]
    chosen = order[first]
    if len(chosen) > size:  # keep the strata best represented by their chosen cast
        chosen = chosen[np.lexsort((xy[chosen, 1], xy[chosen, 0], dist[chosen]))[:size]]
    return np.sort(chosen)


#: Share of the fit's subsample that are close partners of stratified casts.
CLOSE_PAIR_SHARE = 1.0 / 3.0


def _position_key(xy: FloatArray) -> NDArray[np.int64]:
    """A fixed pseudo-random key of each position (not of the row)."""
    q = np.round(xy * 1000.0).astype(np.int64)
    h = (q[:, 0] * np.int64(0x9E3779B1) ^ q[:, 1] * np.int64(0x85EBCA77)) & np.int64(0xFFFFFFFF)
    return (h * np.int64(0xC2B2AE35)) & np.int64(0xFFFFFFFF)


def fit_subsample(xy: ArrayLike, size: int, close_share: float = CLOSE_PAIR_SHARE
                  ) -> IntArray:
    """The casts a dense year's variogram is fitted to: spread over the survey, with close pairs.

    Two thirds are a stratified subsample (:func:`stratified_subsample`); the rest
    are the nearest other cast of half of those (chosen by position), so the fit sees
    the survey's own shortest distances, which carry the nugget and the short-range
    behaviour a spread-out subsample cannot see. Measured on synthetic years of
    5,000 and 20,000 casts (benchmarks/bench_dense.py): without the pairs the fitted
    nugget came out near zero and the leave-one-out mean squared standardized error
    was 1.5 and 2.4 (intervals too narrow); with them, 1.02 and 1.15. Ties in
    distance are broken by position, so the choice does not depend on row order.

    Parameters
    ----------
    xy
        Cast positions, (n, 2). [km]
    size
        Largest subsample size.
    close_share
        Share of the subsample that are close partners.

    Returns
    -------
    numpy.ndarray
        Sorted indices of the chosen casts (all casts when there are ``size`` or fewer).

    References
    ----------
    Diggle, P. & Lophaven, S. (2006). Bayesian geostatistical design. Scand. J. Stat.
    33, 53-64 (lattice plus close pairs).
    """
    xy = np.asarray(xy, float)
    n = len(xy)
    if n <= size:
        return np.arange(n)
    n_pairs = int(round(close_share * size))
    base = stratified_subsample(xy, size - n_pairs)
    pick = base[np.lexsort((xy[base, 1], xy[base, 0], _position_key(xy[base])))][:n_pairs]
    k = int(min(n, 5))
    dist, idx = cKDTree(xy).query(xy[pick], k=k)
    partners = np.empty(len(pick), np.int64)
    for row in range(len(pick)):  # the nearest other cast; ties by position
        cand = idx[row][idx[row] != pick[row]]
        dc = np.hypot(*(xy[cand] - xy[pick[row]]).T)
        partners[row] = cand[np.lexsort((xy[cand, 1], xy[cand, 0], dc))[0]]
    return np.union1d(base, partners)


def _tiles(points: FloatArray, tile_km: float, most: int = _TILE_TARGETS
           ) -> Iterator[IntArray]:
    """Indices of the points grouped by square tiles of ``tile_km`` (at most ``most`` each)."""
    key = np.floor(points / tile_km).astype(np.int64)
    order = np.lexsort((key[:, 1], key[:, 0]))
    k = key[order]
    breaks = np.flatnonzero((k[1:] != k[:-1]).any(axis=1)) + 1
    for group in np.split(order, breaks):
        for start in range(0, len(group), most):
            yield group[start:start + most]


#: Conditioning casts of each cast in the Vecchia approximation used for the drift.
VECCHIA_NEIGHBOURS = 30


def _vecchia_order(xy: FloatArray) -> IntArray:
    """A scattered ordering that depends on the positions only (not on row order).

    Casts are ranked by a fixed pseudo-random key made from their rounded positions,
    a random ordering in effect (Guinness 2018: random and max-min orderings give
    far better Vecchia approximations than coordinate orderings).
    """
    q = np.round(xy * 1000.0).astype(np.int64)
    return np.lexsort((q[:, 1], q[:, 0], _position_key(xy)))


def vecchia_neighbours(xy: FloatArray, m: int = VECCHIA_NEIGHBOURS) -> IntArray:
    """The ``m`` nearest earlier casts of each cast in :func:`_vecchia_order`, (n, m); -1 pads."""
    n = len(xy)
    order = _vecchia_order(xy)
    rank = np.empty(n, np.int64)
    rank[order] = np.arange(n)
    m = int(max(min(m, n - 1), 1))
    nbr = np.full((n, m), -1, np.int64)
    # Ranks in [s, e) find earlier casts in a tree of the first e casts, where at least
    # half the casts are earlier: 3m nearest hold about m or more of them.
    s = 1
    while s < n:
        e = min(2 * s, n)
        rows = order[s:e]
        pref = order[:e]
        kq = int(min(e, 3 * m + 1))
        _, idx = cKDTree(xy[pref]).query(xy[rows], k=kq)
        idx = pref[np.asarray(idx).reshape(len(rows), -1)]
        earlier = rank[idx] < rank[rows][:, None]
        pos = np.cumsum(earlier, axis=1) - 1
        keep = earlier & (pos < m)
        r_i, c_i = np.nonzero(keep)
        nbr[rows[r_i], pos[r_i, c_i]] = idx[r_i, c_i]
        s = e
    return nbr


def vecchia_distances(xy: FloatArray, nbr: IntArray) -> tuple[FloatArray, FloatArray]:
    """Distances among each cast's conditioning casts (n, m, m) and to the cast (n, m). [km]

    Missing conditioning casts (``-1``) get distance 0; :func:`vecchia_whitener`
    makes them inert.
    """
    n, m = nbr.shape
    dNN = np.empty((n, m, m))
    d0 = np.empty((n, m))
    for start in range(0, n, 4096):
        sl = slice(start, min(start + 4096, n))
        nb = nbr[sl]
        P = xy[np.where(nb >= 0, nb, 0)]  # (t, m, 2)
        px, py = np.ascontiguousarray(P[:, :, 0]), np.ascontiguousarray(P[:, :, 1])
        dNN[sl] = np.hypot(px[:, :, None] - px[:, None, :], py[:, :, None] - py[:, None, :])
        d0[sl] = np.hypot(px - xy[sl, :1], py - xy[sl, 1:])
    return dNN, d0


def vecchia_whitener(xy: FloatArray, variogram: Variogram, nbr: IntArray,
                     dist: tuple[FloatArray, FloatArray] | None = None
                     ) -> tuple[IntArray, FloatArray, FloatArray]:
    """Sparse inverse Cholesky factor of the data covariance by Vecchia's approximation.

    Each cast, in a scattered order, is conditioned on its ``m`` nearest casts
    earlier in the order: ``x_i - b_i^T x_N(i)`` has variance ``d_i``. Dividing by
    ``sqrt(d_i)`` whitens the data (``U^T x`` with ``U U^T ~ K^-1``), so
    generalised least squares over all casts is ordinary least squares on whitened
    values.

    Parameters
    ----------
    xy
        Cast positions, (n, 2). [km]
    variogram
        The covariance model (nugget included in the data covariance).
    nbr
        Conditioning casts from :func:`vecchia_neighbours`.

    Returns
    -------
    tuple
        The conditioning casts (n, m) (``-1`` where fewer exist), coefficients ``b``
        (n, m) and ``sqrt(d)`` (n,) [°C].

    References
    ----------
    Vecchia, A. V. (1988). Estimation and model identification for continuous
    spatial processes. J. R. Stat. Soc. B 50, 297-312.
    Guinness, J. (2018). Permutation and grouping methods for sharpening Gaussian
    process approximations. Technometrics 60, 415-429.
    """
    n, m = nbr.shape
    dNN, d0 = vecchia_distances(xy, nbr) if dist is None else dist
    c0 = variogram.sill + variogram.nugget
    jitter = 1e-10 * c0
    b = np.zeros((n, m))
    sd = np.full(n, np.sqrt(c0 + jitter))
    eye = np.eye(m, dtype=bool)
    for start in range(0, n, 4096):
        sl = slice(start, min(start + 4096, n))
        ok = nbr[sl] >= 0
        K = variogram.covariance(dNN[sl])
        K[:, eye] += variogram.nugget + jitter
        k0 = variogram.covariance(d0[sl])
        short = np.flatnonzero(~ok.all(axis=1))
        if len(short):  # missing conditioning casts: identity rows, no covariance
            both = ok[short, :, None] & ok[short, None, :]
            K[short] = np.where(both, K[short], eye[None] * c0)
            k0[short] = np.where(ok[short], k0[short], 0.0)
        bb = np.linalg.solve(K, k0[:, :, None])[:, :, 0]
        b[sl] = bb
        sd[sl] = np.sqrt(np.maximum(c0 + jitter - np.einsum("ij,ij->i", bb, k0), jitter))
    return nbr, b, sd


def _whiten(W: tuple[IntArray, FloatArray, FloatArray], X: FloatArray) -> FloatArray:
    """``U^T X`` for the Vecchia factor ``W`` and columns ``X`` (n, ...)."""
    nbr, b, sd = W
    Xn = X[np.where(nbr >= 0, nbr, 0)]  # (n, m, ...)
    shape = b.shape + (1,) * (X.ndim - 1)
    return (X - np.sum(b.reshape(shape) * Xn, axis=1)) / sd.reshape((-1,) + (1,) * (X.ndim - 1))


class Geometry:
    """What depends on the cast positions only, shared by every variogram of a year.

    The k-d tree, the tile size, the Vecchia conditioning sets and each tiling of
    targets with its neighbourhoods (cached by the targets' bytes): the parameter
    draws of the simulations reuse them.

    Parameters
    ----------
    xy
        Cast positions, (n, 2). [km]
    neighbours
        Nearest casts of every target.
    """

    def __init__(self, xy: FloatArray, neighbours: int) -> None:
        self.xy = xy
        n = len(xy)
        self.k = int(min(neighbours, n))
        self.tree = cKDTree(xy)
        span = np.maximum(np.ptp(xy, axis=0), 1e-6)
        # Tiles holding about half a neighbourhood of casts each.
        self.tile_km = float(np.sqrt(span[0] * span[1] * 0.5 * self.k / n))
        self.vecchia = vecchia_neighbours(xy)
        self.vecchia_dist = vecchia_distances(xy, self.vecchia)
        self._tilings: dict[tuple[tuple[int, ...], bytes], list[tuple[IntArray, IntArray]]] = {}

    def neighbourhood(self, targets: FloatArray) -> IntArray:
        """Union of the nearest casts of every target, sorted. (N,)"""
        _, idx = self.tree.query(targets, k=self.k)
        return np.unique(idx)

    def tiling(self, targets: FloatArray) -> list[tuple[IntArray, IntArray]]:
        """Tiles of the targets, each with its neighbourhood of casts (cached)."""
        key = (targets.shape, hashlib.blake2b(np.ascontiguousarray(targets).tobytes(),
                                              digest_size=16).digest())
        if key not in self._tilings:
            if len(self._tilings) > 4:
                self._tilings.clear()
            self._tilings[key] = [(t, self.neighbourhood(targets[t]))
                                  for t in _tiles(targets, self.tile_km)]
        return self._tilings[key]


class LocalKriging:
    """Kriging from local neighbourhoods with a drift estimated once for the year.

    Has the interface of :class:`coldindex.interpolate.Kriging` that the year's
    computation uses (``xy``, ``z``, ``vg``, ``F``, ``beta``, :meth:`predict`,
    :meth:`loo`); the method is described in the module's docstring.

    Parameters
    ----------
    xy
        Cast positions, (n, 2). [km]
    values
        Cast values, (n,). [°C]
    variogram
        The covariance model.
    drift
        External drift at the casts, (n,) or (n, k); None for ordinary kriging.
    neighbours
        Nearest casts every target is kriged from (at least).
    subsample
        Size of the fit's subsample (:func:`fit_subsample`), whose parameter posterior
        the simulations draw from.

    References
    ----------
    Chilès & Delfiner (2012), Geostatistics, ch. 3; Cressie (1993), Statistics
    for Spatial Data, sect. 3.4; Dubrule (1983), Math. Geol. 15, 687-699.
    """

    def __init__(self, xy: ArrayLike, values: ArrayLike, variogram: Variogram,
                 drift: ArrayLike | None = None, neighbours: int = NEIGHBOURS,
                 subsample: int = FIT_SUBSAMPLE, geometry: Geometry | None = None) -> None:
        self.xy = np.asarray(xy, float)
        self.z = np.asarray(values, float)
        n = len(self.z)
        if n < 3:
            raise TooFewDataError(f"kriging needs at least 3 casts, got: {n}")
        if neighbours < 3:
            raise ValueError(f"neighbours needs to be >= 3, got: {neighbours}")
        self.vg = variogram
        self.F = drift_matrix(n, drift)
        self.geometry = geometry if geometry is not None else Geometry(self.xy, neighbours)
        self.k = self.geometry.k
        self.tile_km = self.geometry.tile_km
        self.sub = fit_subsample(self.xy, subsample)
        # Drift coefficients: generalised least squares over all casts, Vecchia-whitened.
        self._white = vecchia_whitener(self.xy, variogram, self.geometry.vecchia,
                                       self.geometry.vecchia_dist)
        WF = _whiten(self._white, self.F)
        self.G = WF.T @ WF  # F^T K^-1 F, approximately
        self._WF = WF
        self.beta = np.linalg.solve(self.G, WF.T @ _whiten(self._white, self.z))
        self.beta_cov = np.linalg.inv(self.G)

    def beta_of(self, X: FloatArray) -> FloatArray:
        """Drift coefficients of simulated cast values ``X`` (n, b), as for the data. (p, b)"""
        return np.asarray(np.linalg.solve(self.G, self._WF.T @ _whiten(self._white, X)), float)

    def _system(self, nb: IntArray) -> FloatArray:
        K = self.vg.covariance(cdist(self.xy[nb], self.xy[nb]))
        K[np.diag_indices(len(nb))] += self.vg.nugget + 1e-10 * (self.vg.sill + self.vg.nugget)
        return sla.cholesky(K, lower=True, check_finite=False)

    def predict(self, xy0: ArrayLike, drift0: ArrayLike | None = None, *,
                filter_nugget: bool = True, return_variance: bool = True,
                return_weights: bool = False
                ) -> tuple[FloatArray, FloatArray | None, FloatArray | None]:
        """Estimate and variance at target positions, tile by tile.

        Parameters
        ----------
        xy0
            Targets, (m, 2). [km]
        drift0
            External drift at the targets, matching the fit.
        filter_nugget
            Estimate the smooth process (default) or a new noisy observation.
        return_variance
            Whether to return the kriging variance.
        return_weights
            Not available (the weights are local); must be False.

        Returns
        -------
        tuple
            Estimates (m,) [°C], variances (m,) [°C²] or None, and None.
        """
        if return_weights:
            raise ValueError("local kriging has no global weight matrix; use Kriging")
        xy0 = np.atleast_2d(np.asarray(xy0, float))
        m = len(xy0)
        f0 = drift_matrix(m, drift0)
        if f0.shape[1] != self.F.shape[1]:
            raise ValueError("drift0 needs the same columns as the drift of the fit")
        est = np.empty(m)
        var = np.empty(m) if return_variance else None
        c00 = self.vg.sill + (0.0 if filter_nugget else self.vg.nugget)
        resid = self.z - self.F @ self.beta
        for t, nb in self.geometry.tiling(xy0):
            L = self._system(nb)
            d = cdist(xy0[t], self.xy[nb])
            C = self.vg.covariance(d)
            if not filter_nugget and self.vg.nugget > 0:
                C += self.vg.nugget * (d == 0.0)
            A = sla.solve_triangular(L, C.T, lower=True, check_finite=False)  # L^-1 c
            a = sla.solve_triangular(L, resid[nb], lower=True, check_finite=False)
            est[t] = f0[t] @ self.beta + A.T @ a
            if var is not None:
                LiF = sla.solve_triangular(L, self.F[nb], lower=True, check_finite=False)
                u = f0[t] - A.T @ LiF
                v = c00 - np.einsum("ij,ij->j", A, A) + np.einsum(
                    "ij,jk,ik->i", u, self.beta_cov, u)
                var[t] = np.maximum(v, 0.0)
        return est, var, None

    def loo(self) -> tuple[FloatArray, FloatArray]:
        """Leave-one-out errors and variances, Dubrule's closed form inside each neighbourhood.

        Returns
        -------
        tuple
            Errors observed minus predicted (n,) [°C] and variances (n,) [°C²].

        References
        ----------
        Dubrule (1983), Mathematical Geology 15, 687-699, eqs. 10-11, applied to
        the neighbourhood of each tile of casts with the year's drift coefficients.
        """
        n = len(self.z)
        err = np.empty(n)
        var = np.empty(n)
        resid = self.z - self.F @ self.beta
        for t, nb0 in self.geometry.tiling(self.xy):
            nb = np.union1d(nb0, t)  # a cast is its own nearest, unless many share its place
            L = self._system(nb)
            a = sla.cho_solve((L, True), resid[nb], check_finite=False)
            pos = np.searchsorted(nb, t)
            E = np.zeros((len(nb), len(t)))
            E[pos, np.arange(len(t))] = 1.0
            qd = np.sum(sla.solve_triangular(L, E, lower=True, check_finite=False) ** 2, axis=0)
            err[t] = a[pos] / qd
            var[t] = 1.0 / qd
        return err, var


AnyKriging = Kriging | LocalKriging


def make_kriging(xy: ArrayLike, values: ArrayLike, variogram: Variogram,
                 drift: ArrayLike | None = None, dense_threshold: int | None = None,
                 neighbours: int | None = None, subsample: int | None = None) -> AnyKriging:
    """Exact kriging up to ``dense_threshold`` casts, local-neighbourhood kriging above.

    Parameters
    ----------
    xy, values, variogram, drift
        As :class:`coldindex.interpolate.Kriging`.
    dense_threshold
        Most casts kriged exactly; None: :data:`DENSE_THRESHOLD` (measured).
    neighbours
        Nearest casts of every target for :class:`LocalKriging`; None: :data:`NEIGHBOURS`.
    subsample
        Size of the fit's subsample (the same as given to :func:`fit_year`, whose
        posterior the simulations draw from); None: :data:`FIT_SUBSAMPLE`.

    Returns
    -------
    Kriging or LocalKriging
        The kriging system of the year.
    """
    limit = DENSE_THRESHOLD if dense_threshold is None else dense_threshold
    if len(np.asarray(values)) > limit:
        return LocalKriging(xy, values, variogram, drift,
                            neighbours=NEIGHBOURS if neighbours is None else neighbours,
                            subsample=FIT_SUBSAMPLE if subsample is None else subsample)
    return Kriging(xy, values, variogram, drift)


def fit_year(xy: ArrayLike, values: ArrayLike, family: str, drift: ArrayLike | None = None,
             method: str = "reml", dense_threshold: int | None = None,
             subsample: int = FIT_SUBSAMPLE, fixed: Variogram | None = None) -> Fit:
    """Fit the year's variogram; above ``dense_threshold`` casts, to a stratified subsample.

    Parameters
    ----------
    xy, values, family, drift, method
        As :func:`coldindex.fitting.fit_variogram`.
    dense_threshold
        Most casts fitted whole; None: :data:`DENSE_THRESHOLD`.
    subsample
        Subsample size for dense years (:func:`fit_subsample`).
    fixed
        Given parameters: no fit (:func:`coldindex.fitting.fixed_fit`).

    Returns
    -------
    Fit
        The fit (its ``neg2loglik`` is that of the subsample for a dense year).

    References
    ----------
    Stein, Chi & Welty (2004), J. R. Stat. Soc. B 66, 275-296: likelihoods of
    subsets of the data as estimating equations for large spatial data sets.
    """
    if fixed is not None:
        return fixed_fit(family, fixed)
    xy = np.asarray(xy, float)
    z = np.asarray(values, float)
    if len(z) <= (DENSE_THRESHOLD if dense_threshold is None else dense_threshold):
        return fit_variogram(xy, z, family, drift, method=method)
    sub = fit_subsample(xy, subsample)
    d = None if drift is None else drift_matrix(len(z), drift)[sub, 1:]
    return fit_variogram(xy[sub], z[sub], family, d, method=method)


def working_memory_bytes(n_casts: int, n_cells: int, n_years: int, sims: int,
                         dense_threshold: int | None = None,
                         blocked_values: int = BLOCKED_VALUES) -> int:
    """Working memory of the index computation, estimated before it starts. [bytes]

    For the year with the most casts (n) on m active cells, Y years and S simulations,
    in float64: exact kriging holds four n x n matrices, the cell-to-cast covariances
    (n x m, or a block of 4,096 cells when the simulations run in blocks) and, on the
    serial path, S x m realizations; local kriging holds the fit's subsample matrices
    (4 s^2), the Vecchia distances (n x 31 x 30) and a neighbourhood per tile; blocked
    simulations hold a batch of 50 unconditional fields on a lattice of about 2 m
    nodes. Every path keeps the mapped estimate and SD of every year (2 Y m).
    """
    n, m, y, s = int(n_casts), int(n_cells), int(n_years), int(sims)
    if n > (DENSE_THRESHOLD if dense_threshold is None else dense_threshold):
        sub = min(n, FIT_SUBSAMPLE)
        return 8 * (4 * sub * sub + n * (VECCHIA_NEIGHBOURS + 1) * VECCHIA_NEIGHBOURS
                    + 4 * 600 * 600 + 2 * y * m + 100 * m)
    if m * max(s, n) > blocked_values:
        return 8 * (4 * n * n + 2 * n * _TILE_TARGETS + 2 * y * m + 100 * m)
    return 8 * (4 * n * n + n * m + (2 * y + s) * m)


# --------------------------------------------------------------------------------------
# Conditional simulations in blocks of cells


@dataclass
class _Solver:
    """What the residual kriging of simulated cast values needs from one kriging system."""

    kriging: AnyKriging

    def beta_of(self, X: FloatArray) -> FloatArray:
        kr = self.kriging
        if isinstance(kr, LocalKriging):
            return kr.beta_of(X)
        return np.asarray(np.linalg.solve(kr.G, kr.KiF.T @ X), float)  # G^-1 F^T K^-1 X

    def blocks(self, cells: FloatArray) -> Iterator[tuple[IntArray, IntArray,
                                                          FloatArray | None]]:
        """Tiles of cells, each with its casts and Cholesky factor (None: the global one)."""
        kr = self.kriging
        if isinstance(kr, LocalKriging):
            for t, nb in kr.geometry.tiling(cells):
                yield t, nb, kr._system(nb)
        else:
            every = np.arange(len(kr.z))
            for start in range(0, len(cells), _TILE_TARGETS):
                yield np.arange(start, min(start + _TILE_TARGETS, len(cells))), every, None

    def krige(self, cells: FloatArray, f0: FloatArray, X: FloatArray, beta: FloatArray,
              t: IntArray, nb: IntArray, L: FloatArray | None,
              dual: FloatArray | None = None) -> FloatArray:
        """Kriging estimate of values ``X`` (n, b) at the tile's cells, (len(t), b).

        ``dual`` is ``K^-1 (X - F beta)`` of the global system (computed once by the
        caller) when ``L`` is None.
        """
        kr = self.kriging
        if L is not None:
            dual = sla.cho_solve((L, True), X[nb] - kr.F[nb] @ beta, check_finite=False)
        assert dual is not None
        return f0[t] @ beta + kr.vg.covariance(cdist(cells[t], kr.xy[nb])) @ dual

    def dual(self, X: FloatArray, beta: FloatArray) -> FloatArray | None:
        """``K^-1 (X - F beta)`` of exact kriging's global system; None for local kriging."""
        kr = self.kriging
        if isinstance(kr, LocalKriging):
            return None
        return sla.cho_solve((kr.L, True), X - kr.F @ beta, check_finite=False)


def needs_blocks(kriging: AnyKriging, n_cells: int, sims: int,
                 blocked_values: int = BLOCKED_VALUES) -> bool:
    """Whether a year's simulations run in blocks (:func:`simulate_blocked`).

    Local kriging always does; exact kriging when ``n_cells x max(sims, casts)``
    exceeds ``blocked_values`` (the serial path holds that many values at once).
    """
    return (isinstance(kriging, LocalKriging)
            or n_cells * max(int(sims), len(kriging.z)) > blocked_values)


def simulate(kr: AnyKriging, fit: Fit, xy: FloatArray, z: FloatArray,
             drift: FloatArray | None, grid, cell_xy: FloatArray, cell_area: FloatArray,
             drift_cells: FloatArray | None, options, rng: np.random.Generator,
             region_w: FloatArray | None = None, blocked_values: int = BLOCKED_VALUES):
    """The year's simulation summaries: in blocks (:func:`simulate_blocked`) when needed.

    Exact kriging of a grid small enough for the serial path goes to
    :func:`coldindex.simulation.simulate_summaries` unchanged; local kriging, and
    exact kriging when ``cells x max(sims, casts)`` exceeds ``blocked_values``,
    go to :func:`simulate_blocked`. Parameters and returns as those functions.
    """
    from coldindex.simulation import simulate_summaries

    if isinstance(kr, Kriging) and not needs_blocks(kr, len(cell_area), options.sims,
                                                    blocked_values):
        return simulate_summaries(kr, fit, xy, z, drift, grid, cell_xy, cell_area,
                                  drift_cells, options, rng, region_w)
    return simulate_blocked(kr, fit, xy, z, drift, grid, cell_xy, cell_area, drift_cells,
                            options, rng, region_w)


def simulate_blocked(kr: AnyKriging, fit: Fit, xy: FloatArray, z: FloatArray,
                     drift: FloatArray | None, grid, cell_xy: FloatArray,
                     cell_area: FloatArray, drift_cells: FloatArray | None, options,
                     rng: np.random.Generator, region_w: FloatArray | None = None,
                     batch: int = 50):
    """Per-realization summaries as :func:`coldindex.simulation.simulate_summaries`, in blocks.

    Same realizations as the serial path for exact kriging (same draws from
    ``rng`` in the same order, same formulas), but the realizations are summed
    over tiles of cells as they are made, so no realizations x cells array
    exists; cell-to-cast covariances are made per tile. With
    :class:`LocalKriging` the simulated cast values are kriged tile by tile from
    the tiles' neighbourhoods, and the parameter posterior is that of the fit's
    stratified subsample.

    Parameters
    ----------
    kr
        The year's kriging (exact or local).
    fit
        The year's fit.
    xy, z, drift
        The year's casts: positions [km], values [°C], external drift.
    grid
        The grid (:class:`coldindex.domain.Grid`).
    cell_xy, cell_area
        Active cell centres (m, 2) [km] and areas (m,) [km²].
    drift_cells
        External drift at the active cells.
    options
        Index options (``sims``, ``param_draws``, ``thresholds``).
    rng
        The year's random generator.
    region_w
        Area of each active cell inside each region, (r, m) [km²].
    batch
        Realizations made together.

    Returns
    -------
    coldindex.simulation.SimSummaries
        Domain and region summaries per realization, method and note.

    References
    ----------
    Journel & Huijbregts (1978), Mining Geostatistics, ch. VII; Dietrich & Newsam
    (1997), SIAM J. Sci. Comput. 18, 1088-1107.
    """
    from coldindex.regions import node_weights
    from coldindex.simulation import SimSummaries

    n = options.sims
    k = min(options.param_draws, n)
    local = isinstance(kr, LocalKriging)
    if k > 0 and fit.method not in ("wls", "fixed"):  # no posterior to draw from
        sub = kr.sub if isinstance(kr, LocalKriging) else np.arange(len(z))
        fit = with_posterior(fit, xy[sub], z[sub], None if drift is None
                             else drift_matrix(len(z), drift)[sub, 1:])
        draws = draw_variograms(fit, k, rng)
    else:
        draws = [fit.variogram]
    counts = np.full(len(draws), n // len(draws))
    counts[: n % len(draws)] += 1
    thresholds = list(options.thresholds)
    rw = np.zeros((0, len(cell_area))) if region_w is None else np.asarray(region_w, float)
    means, areas, rmeans, rareas = [], [], [], []
    methods: set[str] = set()
    coarse: set[float] = set()
    clipped = 0.0
    for vg, c in zip(draws, counts, strict=True):
        if c == 0:
            continue
        kd: AnyKriging
        if vg == kr.vg:
            kd = kr
        elif isinstance(kr, LocalKriging):
            kd = LocalKriging(xy, z, vg, drift, geometry=kr.geometry)
        else:
            kd = Kriging(xy, z, vg, drift)
        cell = grid.cell_km
        r = refinement(vg.len_scale, cell)
        fine = cell / r
        shape = (len(grid.y) * r, len(grid.x) * r)
        emb = circulant_embedding(shape, fine, vg)
        if emb.clipped_share > CLIP_TOLERANCE and local:
            emb = circulant_embedding(shape, fine, vg, pad_cap=DENSE_PAD_CAP)
        if emb.clipped_share > CLIP_TOLERANCE and not local:
            # The exact fallback simulates at most EXACT_MAX_NODES nodes: small at any grid.
            assert isinstance(kd, Kriging)
            real = conditional_realizations(kd, grid.x, grid.y, grid.mask, cell_area, int(c),
                                            rng, drift_cells, cell_dist=np.empty((0, 0)))
            mu, ar = real.summaries(thresholds)
            rm, ra = weighted_summaries(real.values, node_weights(
                rw, real.node_of_cell, len(real.node_area)), thresholds)
            means.append(mu)
            areas.append(ar)
            rmeans.append(rm)
            rareas.append(ra)
            methods.add("exact")
            coarse.add(real.node_km)
            continue
        clipped = max(clipped, emb.clipped_share)
        mu, ar, rm, ra = _circulant_blocked(kd, emb, grid, r, cell_xy, cell_area,
                                            drift_cells, int(c), rng, rw, thresholds, batch)
        means.append(mu)
        areas.append(ar)
        rmeans.append(rm)
        rareas.append(ra)
        methods.add("circulant")
    method = "+".join(sorted(methods)) if len(methods) > 1 else methods.pop()
    notes = []
    if coarse:
        notes.append("simulated exactly (long length scale: circulant embedding would clip)"
                     + (f" on {max(coarse):.3g} km blocks" if max(coarse) > grid.cell_km + 1e-9
                        else ""))
    if clipped > CLIP_TOLERANCE:
        notes.append(f"circulant embedding clipped {clipped:.2g} of its eigenvalue mass "
                     "(dense survey, long length scale)")
    if isinstance(kr, LocalKriging):
        notes.append(f"local kriging ({kr.k} nearest casts; dense survey)")
    return SimSummaries(means=np.concatenate(means), areas=np.concatenate(areas),
                        method=method, note="; ".join(notes),
                        region_means=np.concatenate(rmeans),
                        region_areas=np.concatenate(rareas))


def _circulant_blocked(kd: AnyKriging, emb, grid, r: int, cell_xy: FloatArray,
                       cell_area: FloatArray, drift_cells: FloatArray | None, n: int,
                       rng: np.random.Generator, rw: FloatArray, thresholds: list[float],
                       batch: int) -> tuple[FloatArray, FloatArray, FloatArray, FloatArray]:
    """The circulant branch of ``conditional_realizations``, summarised tile by tile."""
    vg = kd.vg
    gx, gy = np.asarray(grid.x, float), np.asarray(grid.y, float)
    fine = grid.cell_km / r
    half = (r - 1) // 2
    fgx = gx[0] + fine * (np.arange(len(gx) * r) - half)
    fgy = gy[0] + fine * (np.arange(len(gy) * r) - half)
    m = len(cell_area)
    f0 = drift_matrix(m, drift_cells)
    n_casts = len(kd.z)
    stencil, sk_w, sk_sd = _cast_stencils(kd.xy, fgx, fgy, vg)
    iy, ix = np.nonzero(grid.mask)
    flat_cells = (iy * r + half) * len(fgx) + ix * r + half
    solver = _Solver(kd)
    beta_z = kd.beta
    tw = rw.sum(axis=1)
    total = float(np.sum(cell_area))
    means = np.zeros(n)
    areas = np.zeros((n, len(thresholds)))
    rsum = np.zeros((n, len(rw)))
    rareas = np.zeros((n, len(rw), len(thresholds)))
    for start in range(0, n, batch):
        b = min(batch, n - start)
        S = unconditional_fields(emb, b, rng).reshape(b, -1)
        at_casts = np.einsum("bnk,nk->bn", S[:, stencil], sk_w)
        at_casts += np.sqrt(sk_sd**2 + vg.nugget) * rng.standard_normal((b, n_casts))
        X = at_casts.T  # (n_casts, b)
        beta_x = solver.beta_of(X)
        Z = np.column_stack([kd.z, X])  # the data and the simulated values, kriged together
        B = np.column_stack([beta_z, beta_x])
        dual = solver.dual(Z, B)
        for t, nb, L in solver.blocks(cell_xy):
            both = solver.krige(cell_xy, f0, Z, B, t, nb, L, dual)  # (len(t), 1 + b)
            v = np.take(S, flat_cells[t], axis=1)
            v += both[:, :1].T
            v -= both[:, 1:].T
            sl = slice(start, start + b)
            means[sl] += v @ cell_area[t]
            rsum[sl] += v @ rw[:, t].T
            for j, thr in enumerate(thresholds):
                below = (v < thr).astype(float)
                areas[sl, j] += below @ cell_area[t]
                rareas[sl, :, j] += below @ rw[:, t].T
    means /= total
    with np.errstate(invalid="ignore", divide="ignore"):
        rmeans = np.where(tw > 0, rsum / np.where(tw > 0, tw, 1.0), np.nan)
    return means, areas, rmeans, rareas
