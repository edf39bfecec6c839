"""Variogram fitting, kriging, cross-validation, IDW and conditional simulation.

Kriging is in dual form, leave-one-out cross-validation in closed form, and
Gaussian conditional simulation by circulant embedding.

Everything here works in the equal-area plane, in kilometres.

Conventions
-----------
* Covariance of the smooth process: ``C(h) = sill * rho(h / len_scale)`` with the
  correlation functions and length-scale convention of GSTools (exponential
  ``exp(-r)``, spherical ``1 - 1.5 r + 0.5 r^3`` for ``r < 1``, Gaussian
  ``exp(-pi r^2 / 4)``, Matérn with ``nu = 1.5`` ``(1 + s) exp(-s)``, ``s = sqrt(1.5) r``).
* Data are the smooth process plus a nugget (measurement error and sub-cell
  variability): the data covariance matrix is ``C + nugget * I``.
* By default the mapped field and its standard deviation are of the smooth
  process (nugget filtered): estimates are not forced through the casts and the
  variance excludes the nugget. ``filter_nugget=False`` predicts a new noisy
  observation instead (the convention of pykrige and GSTools).
* Ordinary kriging is universal kriging with the drift ``[1]``; external drift
  adds columns (e.g. depth). The system is solved in generalized-least-squares
  form, mathematically identical to the Lagrange system of Isaaks & Srivastava
  (1989, eq. 12.14): factor ``K = L L^T`` once per year, estimate
  ``f0^T beta + c^T a`` with dual weights ``a = K^-1 (z - F beta)``, variance
  ``C(0) - |L^-1 c|^2 + u^T (F^T K^-1 F)^-1 u`` with ``u = f0 - F^T K^-1 c``.

References
----------
Isaaks, E. H. & Srivastava, R. M. (1989). An Introduction to Applied
Geostatistics. Oxford University Press, ch. 12.
Dubrule, O. (1983). Cross validation of kriging in a unique neighborhood.
Mathematical Geology 15, 687-699.
Dietrich, C. R. & Newsam, G. N. (1997). Fast and exact simulation of stationary
Gaussian processes through circulant embedding of the covariance matrix.
SIAM J. Sci. Comput. 18, 1088-1107.
"""

from __future__ import annotations

from collections.abc import Sequence
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from functools import cached_property

import numpy as np
import scipy.fft
import scipy.linalg as sla
from numpy.typing import ArrayLike, NDArray
from scipy.spatial import cKDTree
from scipy.spatial.distance import cdist

from coldindex.errors import TooFewDataError

FloatArray = NDArray[np.float64]
FAMILIES = ("exponential", "spherical", "matern", "gaussian")
_CHUNK = 8192  # grid cells per block, bounds memory at about 8192 x n x 8 bytes


def correlation(family: str, r_in: ArrayLike) -> FloatArray:
    """Correlation at scaled distance ``r = h / len_scale`` (GSTools' conventions).

    Parameters
    ----------
    family
        ``exponential``, ``spherical``, ``matern`` (nu = 1.5) or ``gaussian``.
    r_in
        Distance divided by the length scale. [1]

    Returns
    -------
    numpy.ndarray
        Correlation in [0, 1].
    """
    r: FloatArray = np.array(r_in, dtype=np.float64)  # a fresh array, reused below
    np.abs(r, out=r)
    return correlation_inplace(family, r)


def correlation_inplace(family: str, r: FloatArray) -> FloatArray:
    """:func:`correlation` of non-negative ``r``, overwriting ``r`` (no temporaries but one).

    Every family is a few in-place passes (``s * s * s``, not ``s**3``: the power
    function costs ten times a product), so the cost is a handful of passes over ``r``.
    """
    if family == "exponential":
        return np.exp(np.negative(r, out=r), out=r)
    if family == "spherical":
        s = np.minimum(r, 1.0, out=r)
        cube = s * s
        cube *= s
        cube *= 0.5
        s *= -1.5
        s += 1.0
        s += cube
        return s
    if family == "gaussian":
        r *= r
        r *= -np.pi / 4.0
        return np.exp(r, out=r)
    if family == "matern":
        r *= np.sqrt(1.5)
        e = np.exp(np.negative(r))
        r += 1.0
        r *= e
        return r
    raise ValueError(f"family needs to be one of {', '.join(FAMILIES)}, got: {family!r}")


#: Elements per block of the blocked covariance (about 256 kB of float64: stays in cache).
_BLOCK_ELEMENTS = 32768


def covariance_blocked(family: str, dist: FloatArray, len_scale: float, sill: float,
                       out: FloatArray | None = None) -> FloatArray:
    """``sill * correlation(dist / len_scale)`` in cache-sized blocks of rows.

    Equal to :meth:`Variogram.covariance` (same operations, same order) without the
    full-size temporaries, which matter for cells x casts matrices of tens of MB.

    Parameters
    ----------
    family
        Correlation family.
    dist
        Distances, (m, n) or any shape. [km]
    len_scale
        Length scale. [km]
    sill
        Partial sill. [°C²]
    out
        Array of the same shape to write into (may be ``dist`` itself).

    Returns
    -------
    numpy.ndarray
        Covariances, (m, n). [°C²]
    """
    d = np.asarray(dist, float)
    res = np.empty(d.shape) if out is None else out
    if d.ndim != 2 or d.shape[0] == 0:
        np.divide(d, len_scale, out=res)
        np.abs(res, out=res)
        correlation_inplace(family, res)
        res *= sill
        return res
    rows = max(1, _BLOCK_ELEMENTS // max(d.shape[1], 1))
    for start in range(0, d.shape[0], rows):
        sl = slice(start, start + rows)
        blk = res[sl]
        np.divide(d[sl], len_scale, out=blk)
        np.abs(blk, out=blk)
        correlation_inplace(family, blk)
        blk *= sill
    return res


@dataclass(frozen=True)
class Variogram:
    """A fitted variogram model.

    Attributes
    ----------
    family
        Correlation family.
    sill
        Partial sill: variance of the smooth process. [°C²]
    len_scale
        Length scale (GSTools convention). [km]
    nugget
        Nugget: measurement error plus sub-cell variance. [°C²]
    """

    family: str
    sill: float
    len_scale: float
    nugget: float

    def covariance(self, h: ArrayLike) -> FloatArray:
        """Covariance of the smooth process at distance ``h`` [km]. [°C²]"""
        return covariance_blocked(self.family, np.asarray(h, float), self.len_scale,
                                  self.sill)

    def semivariance(self, h: ArrayLike) -> FloatArray:
        """Semivariance of the data at distance ``h`` [km] (nugget included for h > 0). [°C²]"""
        h = np.asarray(h, float)
        return np.where(h > 0, self.nugget + self.sill - self.covariance(h), 0.0)

    def describe(self) -> str:
        """Compact text form, e.g. ``exponential(sill=0.41,len_km=85.2,nugget=0.021)``."""
        return (f"{self.family}(sill={self.sill:.4g},len_km={self.len_scale:.4g},"
                f"nugget={self.nugget:.4g})")


def drift_matrix(n: int, drift: ArrayLike | None) -> FloatArray:
    """Drift columns: a constant, plus the external drift's columns, (n, 1 + k)."""
    cols = [np.ones(n)]
    if drift is not None:
        d = np.asarray(drift, float).reshape(n, -1)
        cols += [d[:, j] for j in range(d.shape[1])]
    return np.column_stack(cols)


class Kriging:
    """Ordinary kriging (or kriging with external drift), factored once.

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
    """

    def __init__(self, xy: ArrayLike, values: ArrayLike, variogram: Variogram,
                 drift: ArrayLike | None = None) -> None:
        self.xy = np.asarray(xy, float)
        self.z = np.asarray(values, float)
        n = len(self.z)
        if n < 3:
            raise TooFewDataError(f"kriging needs at least 3 casts, got: {n}")
        self.vg = variogram
        self.F = drift_matrix(n, drift)
        K = variogram.covariance(cdist(self.xy, self.xy))
        K[np.diag_indices(n)] += variogram.nugget
        # A relative jitter keeps a nugget-free smooth family factorisable.
        K[np.diag_indices(n)] += 1e-10 * (variogram.sill + variogram.nugget)
        self.K = K
        self.L = sla.cholesky(K, lower=True)
        self.KiF = sla.cho_solve((self.L, True), self.F)
        self.G = self.F.T @ self.KiF  # F^T K^-1 F
        Kiz = sla.cho_solve((self.L, True), self.z)
        self.beta = np.linalg.solve(self.G, self.F.T @ Kiz)
        self.dual = sla.cho_solve((self.L, True), self.z - self.F @ self.beta)

    def _cross(self, xy0: FloatArray, filter_nugget: bool) -> FloatArray:
        d = cdist(xy0, self.xy)
        at_cast = (d == 0.0) if not filter_nugget and self.vg.nugget > 0 else None
        c = covariance_blocked(self.vg.family, d, self.vg.len_scale, self.vg.sill, out=d)
        if at_cast is not None:
            c += self.vg.nugget * at_cast
        return c

    @cached_property
    def _lif(self) -> FloatArray:
        """``L^-1 F`` (n, p), for the variance by triangular solves."""
        return np.asarray(sla.solve_triangular(self.L, self.F, lower=True, check_finite=False))

    @cached_property
    def _q(self) -> tuple[FloatArray, FloatArray]:
        """``Q = K^-1 - K^-1 F G^-1 F^T K^-1`` (n, n) and ``R = K^-1 F G^-1`` (n, p)."""
        n = len(self.z)
        Kinv = sla.cho_solve((self.L, True), np.eye(n), check_finite=False)
        R = np.linalg.solve(self.G, self.KiF.T).T
        return Kinv - R @ self.KiF.T, R

    def predict(self, xy0: ArrayLike, drift0: ArrayLike | None = None, *,
                filter_nugget: bool = True, return_variance: bool = True,
                return_weights: bool = False
                ) -> tuple[FloatArray, FloatArray | None, FloatArray | None]:
        """Kriging estimate, variance and (optionally) weights at target positions.

        The estimate uses the dual weights: ``f0^T beta + c^T a``, one matrix
        product per block of targets. The weights of the Lagrange system are
        ``lambda = Q c + R f0`` with ``Q`` and ``R`` formed once per year from the
        Cholesky factor, so the weights of a block cost one matrix product. The
        variance ``C(0) - lambda^T c - mu^T f0`` with multipliers
        ``mu = G^-1 (F^T K^-1 c - f0)`` (Isaaks & Srivastava 1989, eq. 12.14,
        generalised to a drift) equals ``C(0) - |v|^2 + u^T G^-1 u`` with
        ``v = L^-1 c`` and ``u = f0 - (L^-1 F)^T v``: one triangular solve per
        block of targets, half the operations of forming the weights.

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
            Whether to return the weights (m, n), e.g. for conditional simulation.

        Returns
        -------
        tuple
            Estimates (m,) [°C], variances (m,) [°C²] or None, weights (m, n) or None.
        """
        xy0 = np.atleast_2d(np.asarray(xy0, float))
        m = len(xy0)
        f0 = drift_matrix(m, drift0)
        if f0.shape[1] != self.F.shape[1]:
            raise ValueError("drift0 needs the same columns as the drift of the fit")
        est = np.empty(m)
        var = np.empty(m) if return_variance else None
        W = np.empty((m, len(self.z))) if return_weights else None
        c00 = self.vg.sill + (0.0 if filter_nugget else self.vg.nugget)
        Ginv = np.linalg.inv(self.G)
        for start in range(0, m, _CHUNK):
            sl = slice(start, min(start + _CHUNK, m))
            C = self._cross(xy0[sl], filter_nugget)  # (b, n)
            est[sl] = f0[sl] @ self.beta + C @ self.dual
            if W is not None:
                Q, R = self._q
                W[sl] = C @ Q + f0[sl] @ R.T  # (b, n), Q symmetric
            if var is not None:
                # v = L^-1 c for every target of the block, in place of C (not used again).
                V = sla.solve_triangular(self.L, C.T, lower=True, check_finite=False,
                                         overwrite_b=True)  # (n, b)
                u = f0[sl] - V.T @ self._lif  # (b, p)
                v = c00 - np.einsum("ij,ij->j", V, V) + np.einsum("ij,ij->i", u @ Ginv, u)
                var[sl] = np.maximum(v, 0.0)
        return est, var, W

    def weights(self, xy0: ArrayLike, drift0: ArrayLike | None = None, *,
                filter_nugget: bool = True) -> FloatArray:
        """Kriging weights of the casts for each target, (m, n)."""
        _, _, W = self.predict(xy0, drift0, filter_nugget=filter_nugget,
                               return_variance=False, return_weights=True)
        assert W is not None
        return W

    def loo(self) -> tuple[FloatArray, FloatArray]:
        """Leave-one-out errors and their kriging variances, in closed form.

        With ``Q`` the inverse of the full kriging matrix restricted to the data
        block, ``Q = K^-1 - K^-1 F (F^T K^-1 F)^-1 F^T K^-1``, the error of
        predicting cast i from all others is ``(Q z)_i / Q_ii`` and its variance
        ``1 / Q_ii`` (a new noisy observation, nugget included).

        Returns
        -------
        tuple
            Errors observed minus predicted (n,) [°C] and variances (n,) [°C²].

        References
        ----------
        Dubrule, O. (1983). Cross validation of kriging in a unique
        neighborhood. Mathematical Geology 15, 687-699, eqs. 10-11.
        """
        qd = np.diag(self._q[0])
        return self.dual / qd, 1.0 / qd


def idw_predict(xy: ArrayLike, values: ArrayLike, xy0: ArrayLike, power: float = 2.0,
                k: int = 12) -> FloatArray:
    """Inverse-distance-weighted estimate from the ``k`` nearest casts.

    Parameters
    ----------
    xy, values
        Cast positions (n, 2) [km] and values (n,).
    xy0
        Targets, (m, 2). [km]
    power
        Distance exponent.
    k
        Number of nearest casts used.

    Returns
    -------
    numpy.ndarray
        Estimates (m,); exact at the casts.
    """
    xy = np.asarray(xy, float)
    z = np.asarray(values, float)
    k = min(k, len(z))
    dist, idx = cKDTree(xy).query(np.asarray(xy0, float), k=k)
    dist = dist.reshape(len(dist), -1)
    idx = idx.reshape(len(idx), -1)
    with np.errstate(divide="ignore"):
        w = 1.0 / dist**power
    exact = dist[:, 0] == 0
    w[exact] = 0.0
    w[exact, 0] = 1.0
    return np.einsum("ij,ij->i", w, z[idx]) / w.sum(axis=1)


def idw_loo(xy: ArrayLike, values: ArrayLike, power: float = 2.0, k: int = 12) -> FloatArray:
    """Leave-one-out errors (observed minus predicted) of :func:`idw_predict`."""
    xy = np.asarray(xy, float)
    z = np.asarray(values, float)
    kk = min(k + 1, len(z))
    dist, idx = cKDTree(xy).query(xy, k=kk)
    dist, idx = dist[:, 1:], idx[:, 1:]
    w = 1.0 / np.maximum(dist, 1e-12) ** power
    pred = np.einsum("ij,ij->i", w, z[idx]) / w.sum(axis=1)
    return z - pred


@dataclass(frozen=True)
class Embedding:
    """Square roots of the circulant-embedding eigenvalues for one grid.

    Attributes
    ----------
    root
        ``sqrt(max(lambda, 0) / M)`` on the embedding torus, (My, Mx).
    shape
        The simulated grid's shape (ny, nx).
    clipped_share
        Share of the eigenvalue mass that was negative and clipped to zero.
    pad_factor
        Embedding size relative to the grid along each axis.
    """

    root: FloatArray
    shape: tuple[int, int]
    clipped_share: float
    pad_factor: float


def _even_spectrum(c: FloatArray) -> FloatArray:
    """2-D DFT of an array that is even along both axes (a covariance on the torus).

    The transform is real and even, so half of it comes from one real FFT and the
    other half is its mirror: half the work of a complex FFT, same values (to
    rounding).
    """
    mx = c.shape[1]
    half = scipy.fft.rfft2(c, workers=-1).real  # (my, mx // 2 + 1)
    lam = np.empty(c.shape)
    lam[:, : mx // 2 + 1] = half
    lam[:, mx // 2 + 1:] = half[:, 1: mx - mx // 2][:, ::-1]
    return lam


def circulant_embedding(shape: tuple[int, int], cell_km: float, variogram: Variogram,
                        pad_cap: float = 2.5, tol: float = 1e-10) -> Embedding:
    """Embed the smooth process' covariance on a periodic grid for FFT simulation.

    The embedding starts at twice the grid along each axis and grows by a
    quarter until every eigenvalue is at least ``-tol`` times the largest, up to
    ``pad_cap`` times the grid (default 2.5: beyond it the cost grows with the
    square of the factor while the clipped share, reported, is already small).
    What is still negative is clipped to zero and its share of the eigenvalue
    mass reported.

    Parameters
    ----------
    shape
        Grid shape (ny, nx).
    cell_km
        Grid spacing. [km]
    variogram
        Covariance model (the nugget is not part of the simulated field).
    pad_cap
        Largest embedding size relative to the grid.
    tol
        Accepted negative eigenvalue relative to the largest.

    Returns
    -------
    Embedding
        The spectral square root and clipping diagnostics.

    References
    ----------
    Dietrich & Newsam (1997), SIAM J. Sci. Comput. 18, 1088-1107.
    """
    ny, nx = shape
    factor = 2.0
    while True:
        my = scipy.fft.next_fast_len(int(np.ceil(factor * ny)), real=False)
        mx = scipy.fft.next_fast_len(int(np.ceil(factor * nx)), real=False)
        ky = np.minimum(np.arange(my), my - np.arange(my)) * cell_km
        kx = np.minimum(np.arange(mx), mx - np.arange(mx)) * cell_km
        h = np.hypot(ky[:, None], kx[None, :])
        lam = _even_spectrum(variogram.covariance(h))
        neg = lam < -tol * lam.max()
        if not neg.any() or factor * 1.25 > pad_cap + 1e-9:
            break
        factor *= 1.25
    clipped = float(-lam[lam < 0].sum() / np.abs(lam).sum()) if (lam < 0).any() else 0.0
    root = np.sqrt(np.maximum(lam, 0.0) / (my * mx))
    return Embedding(root=root, shape=(ny, nx), clipped_share=clipped, pad_factor=factor)


THREAD_LIMIT = [2]
"""Most OS threads the simulations' own pools use (a one-item list, set process-wide).

Results never depend on it: the draws are split into a fixed number of streams and the
conditioning writes disjoint cells. :func:`coldindex.parallel.run_pinned` sets it to the
task's pin (one thread), so ``--workers N`` uses N cores and no more.
"""


def _pool_size(threads: int) -> int:
    return max(1, min(threads, THREAD_LIMIT[0]))


def unconditional_fields(emb: Embedding, n: int, rng: np.random.Generator,
                         threads: int = 2) -> FloatArray:
    """Draw ``n`` unconditional realizations of the smooth process on the grid.

    One complex FFT yields two independent real fields (its real and imaginary
    parts), so ``n`` fields cost ``ceil(n / 2)`` transforms. Draws and transforms
    are in single precision (relative error about 1e-7, far below Monte Carlo
    error); the fields are returned in double precision. The pairs are shared
    among ``threads`` threads, each with its own child of ``rng`` (so the result
    depends on ``rng`` and ``threads`` only, not on timing).

    Returns
    -------
    numpy.ndarray
        Fields of shape (n, ny, nx), zero mean, covariance of the embedding.
    """
    ny, nx = emb.shape
    my, mx = emb.root.shape
    root = emb.root.astype(np.float32)
    out = np.empty((n, ny, nx))
    pairs = list(range(0, n, 2))
    children = rng.spawn(threads)

    def work(k: int) -> None:
        r = children[k]
        buf = np.empty((my, 2 * mx), dtype=np.float32)  # one buffer a thread: no page faults
        for i in pairs[k::threads]:
            eps = r.standard_normal(dtype=np.float32, out=buf).view(np.complex64)
            eps *= root
            # The 2-D FFT, axis 0 then axis 1 (fft2's order, same bytes), the second pass
            # only over the ny rows the grid keeps.
            cols = scipy.fft.fft(eps, axis=0, workers=1, overwrite_x=True)
            field = scipy.fft.fft(cols[:ny], axis=1, workers=1, overwrite_x=True)[:, :nx]
            out[i] = field.real
            if i + 1 < n:
                out[i + 1] = field.imag

    with ThreadPoolExecutor(max_workers=_pool_size(threads)) as pool:
        list(pool.map(work, range(threads)))  # `threads` streams, however many OS threads
    return out


#: Largest share of the embedding's eigenvalue mass that may be clipped before the
#: exact simulation takes over.
CLIP_TOLERANCE = 1e-6
#: Most simulation nodes of the exact (Cholesky) simulation; finer grids are
#: simulated on blocks of whole cells.
EXACT_MAX_NODES = 2000


@dataclass(frozen=True)
class Realizations:
    """Conditional realizations of the smooth process for one variogram.

    Attributes
    ----------
    values
        Realizations at the simulation nodes, (n, k). [°C]
    node_of_cell
        For each active cell, the index of its node; None when the nodes are the
        active cells themselves.
    node_area
        Area of each node's cells, (k,). [km²]
    method
        ``circulant`` (circulant embedding on the grid) or ``exact`` (Cholesky
        factor of the joint covariance of nodes and casts).
    node_km
        Spacing of the simulation nodes. [km]
    clipped_share
        Share of the embedding's eigenvalue mass that was negative (before the
        exact fallback took over, if it did).
    """

    values: FloatArray
    node_of_cell: NDArray[np.int_] | None
    node_area: FloatArray
    method: str
    node_km: float
    clipped_share: float

    def summaries(self, thresholds: ArrayLike) -> tuple[FloatArray, FloatArray]:
        """Per realization: area-weighted mean (n,) [°C], area below each threshold (n, t) [km²]."""
        t = np.atleast_1d(np.asarray(thresholds, float))
        means, areas = weighted_summaries(self.values, self.node_area[None, :], list(t))
        return means[:, 0], areas[:, 0, :]


def weighted_summaries(values: FloatArray, weights: FloatArray, thresholds: Sequence[float]
                       ) -> tuple[FloatArray, FloatArray]:
    """Per-realization weighted means and areas below thresholds.

    Parameters
    ----------
    values
        Realizations at the simulation nodes, (n, k). [°C]
    weights
        Area of each node inside each region, (r, k). [km²]
    thresholds
        Thresholds. [°C]

    Returns
    -------
    tuple
        Means (n, r) [°C] (NaN for a region without area) and areas (n, r, t). [km²]
    """
    w = np.asarray(weights, float)
    tot = w.sum(axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        means = np.where(tot > 0, (values @ w.T) / np.where(tot > 0, tot, 1.0), np.nan)
    n, k = values.shape
    areas = np.empty((n, len(w), len(thresholds)))
    rows = max(1, _BLOCK_ELEMENTS // max(k, 1))  # realizations per block: stays in cache
    below = np.empty((min(rows, n), k))
    for start in range(0, n, rows):
        v = values[start:start + rows]
        b = below[: len(v)]
        for j, t in enumerate(thresholds):
            np.less(v, t, out=b)  # 1.0 where below, 0.0 elsewhere
            areas[start:start + rows, :, j] = b @ w.T
    return means, areas


def _coarse_nodes(mask: NDArray[np.bool_], max_nodes: int) -> tuple[NDArray[np.int_], int]:
    """Each active cell's block label, and the block side f in cells.

    Blocks are squares of ``f x f`` cells, with the smallest f giving at most
    ``max_nodes`` blocks that hold active cells.
    """
    iy, ix = np.nonzero(mask)
    f = 1
    while True:
        label = (iy // f) * (mask.shape[1] // f + 1) + ix // f
        uniq, node = np.unique(label, return_inverse=True)
        if len(uniq) <= max_nodes:
            return node.ravel(), f
        f += 1


#: Fewest simulation nodes per length scale; coarser cells are refined (odd factors up to 5).
NODES_PER_LENGTH = 4.0


def refinement(len_scale: float, cell_km: float) -> int:
    """Odd refinement of the grid for the unconditional simulation (1, 3 or 5).

    The unconditional field's value at a cast is interpolated from the nodes
    around it (:func:`_cast_stencils`), which is accurate when nodes are at
    most a quarter of the length scale apart (measured: the domain-mean SD is
    0.98 of the exact block-kriging SD at 4 nodes per length scale, 0.91 at 2).
    """
    if not len_scale > 0:
        return 1
    need = NODES_PER_LENGTH * cell_km / len_scale
    return int(min(5, max(1, 2 * np.ceil((need - 1) / 2) + 1)))


def _cast_stencils(xy: FloatArray, gx: FloatArray, gy: FloatArray, vg: Variogram
                   ) -> tuple[NDArray[np.int_], FloatArray, FloatArray]:
    """Simple-kriging stencils from grid nodes to off-grid casts.

    Each cast gets the 4 x 4 grid nodes around it (shifted inside the grid at its
    edges), the simple-kriging weights of those nodes for the cast's position
    under the smooth process' covariance, and the simple-kriging standard
    deviation. The node covariance matrix is the same for every stencil (the
    nodes form one fixed pattern), so it is factored once.

    Returns
    -------
    tuple
        Flat node indices (n, 16), weights (n, 16) and standard deviations (n,) [°C].
    """
    cell = float(gx[1] - gx[0]) if len(gx) > 1 else float(gy[1] - gy[0])
    nx, ny = len(gx), len(gy)
    kx, ky = min(4, nx), min(4, ny)
    ix0 = np.clip(np.floor((xy[:, 0] - gx[0]) / cell).astype(int) - (kx // 2 - 1), 0, nx - kx)
    iy0 = np.clip(np.floor((xy[:, 1] - gy[0]) / cell).astype(int) - (ky // 2 - 1), 0, ny - ky)
    oy2, ox2 = np.meshgrid(np.arange(ky), np.arange(kx), indexing="ij")
    ox, oy = ox2.ravel(), oy2.ravel()
    pattern = np.column_stack([ox * cell, oy * cell])  # node offsets from the stencil origin
    Cnn = vg.covariance(cdist(pattern, pattern))
    Cnn[np.diag_indices(len(pattern))] += 1e-10 * vg.sill + 1e-300
    rel = xy - np.column_stack([gx[ix0], gy[iy0]])  # cast position from the stencil origin
    C0 = vg.covariance(cdist(rel, pattern))  # (n, k)
    cf = sla.cho_factor(Cnn, lower=True, check_finite=False)
    W = sla.cho_solve(cf, C0.T, check_finite=False).T
    var = np.maximum(vg.sill - np.einsum("nk,nk->n", W, C0), 0.0)
    nodes = (iy0[:, None] + oy[None, :]) * nx + (ix0[:, None] + ox[None, :])
    return nodes, W, np.sqrt(var)


@dataclass
class DrawCache:
    """Pieces of one year's simulations that several variogram parameter draws share.

    Draws from the posterior grid repeat its points: the same length scale (and smooth
    share) with another total variance. What depends on the length scale alone is kept
    at unit sill and scaled (the embedding's square-root spectrum and the stencils'
    residual SD by ``sqrt(sill)``, the exact simulation's factor by ``sqrt(sill)`` and
    its covariances by ``sill``): the same realizations to rounding, computed once.

    Attributes
    ----------
    keep
        ``(family, len_scale, share)`` of the draws still to come; pieces of other keys
        are dropped (set by the caller before each draw).
    max_factors
        Most exact-simulation factors held at once (each is (k + n)² doubles).
    """

    keep: set[tuple[str, float, float]] = field(default_factory=set)
    max_factors: int = 3
    embeddings: dict[tuple, Embedding] = field(default_factory=dict)
    stencils: dict[tuple, tuple[NDArray[np.int_], FloatArray, FloatArray]] = field(
        default_factory=dict)
    factors: dict[tuple, tuple[FloatArray, FloatArray]] = field(default_factory=dict)
    exact_layout: tuple | None = None

    def _lens(self) -> set[tuple[str, float]]:
        return {(fam, ln) for fam, ln, _ in self.keep}

    def prune(self) -> None:
        """Drop the pieces no later draw uses."""
        lens = self._lens()
        for d in (self.embeddings, self.stencils):
            for key in [k for k in d if k[:2] not in lens]:
                del d[key]
        for key in [k for k in self.factors if k not in self.keep]:
            del self.factors[key]


def share_of(vg: Variogram) -> float:
    """Share of the smooth process in the total variance, ``sill / (sill + nugget)``."""
    total = vg.sill + vg.nugget
    return vg.sill / total if total > 0 else 0.0


#: Active cells per block of the conditioning pass (cells x casts covariances of a block
#: stay within a few MB).
_COND_CELLS = 1024


def _condition(out: FloatArray, kriging: Kriging, X: FloatArray, f0: FloatArray,
               mask: NDArray[np.bool_], gx: FloatArray, gy: FloatArray,
               cell_dist: FloatArray | None, threads: int = 2) -> None:
    """Turn unconditional values at the cells into conditional realizations, in place.

    ``out[j] += estimate - krige(X[:, j])`` for every realization j, one block of
    cells at a time: the block's covariances to the casts are formed once for the
    estimate and all realizations (one matrix product), never the whole cells x
    casts matrix unless ``cell_dist`` is given. The blocks are shared among
    ``threads`` threads (each writes its own cells: the result does not depend on it).
    """
    vg = kriging.vg
    Q, R = kriging._q
    A = Q @ X  # (n_casts, n)
    RtX = R.T @ X  # (p, n)
    m = out.shape[1]
    cxy: FloatArray | None = None
    if cell_dist is None or cell_dist.shape != (m, len(kriging.z)):
        xx, yy = np.meshgrid(gx, gy)
        cxy = np.column_stack([xx[mask], yy[mask]])

    def block(start: int) -> None:
        sl = slice(start, min(start + _COND_CELLS, m))
        d = cdist(cxy[sl], kriging.xy) if cxy is not None else cell_dist[sl]  # type: ignore[index]
        C = covariance_blocked(vg.family, d, vg.len_scale, vg.sill,
                               out=d if cxy is not None else None)
        est = f0[sl] @ kriging.beta + C @ kriging.dual
        corr = C @ A + f0[sl] @ RtX  # (cells, n)
        blk = out[:, sl]
        blk += est[None, :]
        blk -= corr.T

    starts = range(0, m, _COND_CELLS)
    if _pool_size(threads) > 1 and len(starts) > 1:
        with ThreadPoolExecutor(max_workers=_pool_size(threads)) as pool:
            list(pool.map(block, starts))
    else:
        for start in starts:
            block(start)


def conditional_realizations(kriging: Kriging, grid_x: ArrayLike, grid_y: ArrayLike,
                             mask: ArrayLike, cell_area: ArrayLike, n: int,
                             rng: np.random.Generator, drift_cells: ArrayLike | None = None,
                             cell_dist: FloatArray | None = None, batch: int = 50,
                             pad_cap: float = 2.5, clip_tolerance: float = CLIP_TOLERANCE,
                             exact_max_nodes: int = EXACT_MAX_NODES,
                             cache: DrawCache | None = None) -> Realizations:
    """Conditional realizations of the smooth process over the active grid cells.

    Each realization is ``estimate(data) + S - estimate(S_casts + e)``: an
    unconditional field ``S``, its values at the casts plus independent nugget
    noise ``e ~ N(0, nugget)``, kriged with the same weights as the data
    (Journel & Huijbregts 1978, ch. VII). The realizations are of the smooth
    process, matching the nugget-filtered map and its standard deviation.

    ``S`` comes from circulant embedding on the grid (Dietrich & Newsam 1997);
    its value at a cast, which lies between grid nodes, is the simple-kriging
    estimate from the 4 x 4 surrounding nodes plus an independent residual with
    the simple-kriging variance (:func:`_cast_stencils`). Where the cells are
    coarse for the length scale, the field is simulated on a lattice refined by
    an odd factor (:func:`refinement`), whose nodes include the cell centres.
    When the embedding, grown up to ``pad_cap`` times
    the grid, would still clip more than ``clip_tolerance`` of its eigenvalue
    mass (long length scales), the simulation is instead exact: ``S`` is drawn
    from the Cholesky factor of the joint covariance of the casts and of nodes
    that are the active cells, or, on grids with more than ``exact_max_nodes``
    active cells, area-weighted centres of square blocks of cells (each node
    stands for its block's area in the summaries).

    Parameters
    ----------
    kriging
        The kriging system of this variogram.
    grid_x, grid_y
        Grid cell-centre axes (equally spaced). [km]
    mask
        Active cells, (ny, nx).
    cell_area
        Areas of the active cells (row-major order of ``mask``). [km²]
    n
        Number of realizations.
    rng
        Random generator (seed it per year).
    drift_cells
        External drift at the active cells, when the kriging has one.
    cell_dist
        Distances from the active cells to the casts, (m, n), when already computed. [km]
    batch
        Realizations processed together (bounds memory).
    pad_cap
        Largest embedding size relative to the grid.
    clip_tolerance
        Largest clipped share of eigenvalue mass accepted from the embedding.
    exact_max_nodes
        Most nodes of the exact simulation.
    cache
        Pieces shared with other parameter draws of the same year (:class:`DrawCache`);
        None computes everything for this variogram.

    Returns
    -------
    Realizations
        Values at the simulation nodes, their areas and the method used.

    References
    ----------
    Journel, A. G. & Huijbregts, C. J. (1978). Mining Geostatistics. Academic
    Press, ch. VII. Dietrich & Newsam (1997), SIAM J. Sci. Comput. 18, 1088-1107.
    """
    gx = np.asarray(grid_x, float)
    gy = np.asarray(grid_y, float)
    mask = np.asarray(mask, bool)
    area = np.asarray(cell_area, float)
    cell = float(gx[1] - gx[0]) if len(gx) > 1 else float(gy[1] - gy[0])
    vg = kriging.vg
    m = int(mask.sum())
    f0 = drift_matrix(m, drift_cells)
    Q, R = kriging._q
    sd_nug = np.sqrt(vg.nugget)
    n_casts = len(kriging.z)
    # Simulate on nodes at least four per length scale: the cell centres, or a finer lattice
    # (an odd refinement, so every cell centre is a node) when cells are coarse.
    r = refinement(vg.len_scale, cell)
    fine = cell / r
    half = (r - 1) // 2
    fgx = gx[0] + fine * (np.arange(len(gx) * r) - half)
    fgy = gy[0] + fine * (np.arange(len(gy) * r) - half)
    lens = (vg.family, vg.len_scale)
    unit = Variogram(vg.family, 1.0, vg.len_scale, 0.0)
    root_scale = float(np.sqrt(vg.sill))
    if not vg.sill > 0:
        cache = None  # a pure nugget: nothing to scale, nothing worth sharing
    if cache is None:
        emb = circulant_embedding((len(fgy), len(fgx)), fine, vg, pad_cap=pad_cap)
    else:
        ekey = (*lens, len(fgy), len(fgx), fine, pad_cap)
        emb1 = cache.embeddings.get(ekey)
        if emb1 is None:
            emb1 = circulant_embedding((len(fgy), len(fgx)), fine, unit, pad_cap=pad_cap)
            if lens in cache._lens():
                cache.embeddings[ekey] = emb1
        emb = Embedding(root=emb1.root * root_scale, shape=emb1.shape,
                        clipped_share=emb1.clipped_share, pad_factor=emb1.pad_factor)
    out: FloatArray
    if emb.clipped_share <= clip_tolerance:
        if cache is None:
            stencil, sk_w, sk_sd = _cast_stencils(kriging.xy, fgx, fgy, vg)
        else:
            skey = (*lens, r)
            pieces = cache.stencils.get(skey)
            if pieces is None:
                pieces = _cast_stencils(kriging.xy, fgx, fgy, unit)
                if lens in cache._lens():
                    cache.stencils[skey] = pieces
            stencil, sk_w, sk_sd1 = pieces
            sk_sd = sk_sd1 * root_scale
        noise_sd = np.sqrt(sk_sd**2 + vg.nugget)
        iy, ix = np.nonzero(mask)
        flat_cells = (iy * r + half) * len(fgx) + ix * r + half
        # First every realization's unconditional field at the cells and at the casts (the
        # random draws, in the same order as ever), then one pass over blocks of cells adds
        # the kriging estimate and subtracts the kriged unconditional values.
        out = np.empty((n, m))
        X = np.empty((n_casts, n))
        for start in range(0, n, batch):
            b = min(batch, n - start)
            S = unconditional_fields(emb, b, rng).reshape(b, -1)
            at_casts = np.einsum("bnk,nk->bn", S[:, stencil], sk_w)
            at_casts += noise_sd * rng.standard_normal((b, n_casts))
            X[:, start:start + b] = at_casts.T
            np.take(S, flat_cells, axis=1, out=out[start:start + b], mode="clip")  # unbuffered
        _condition(out, kriging, X, f0, mask, gx, gy, cell_dist)
        return Realizations(values=out, node_of_cell=None, node_area=area, method="circulant",
                            node_km=fine, clipped_share=emb.clipped_share)
    # Exact fallback on the cells, or on blocks of cells.
    layout = cache.exact_layout if cache is not None else None
    if layout is None or layout[0] != exact_max_nodes:
        xx, yy = np.meshgrid(gx, gy)
        cxy = np.column_stack([xx[mask], yy[mask]])
        node, f = _coarse_nodes(mask, exact_max_nodes)
        k = int(node.max()) + 1
        node_area = np.bincount(node, weights=area, minlength=k).astype(float)
        nxy = np.column_stack([np.bincount(node, weights=area * cxy[:, j], minlength=k)
                               for j in range(2)]) / node_area[:, None]
        fn = np.column_stack([np.bincount(node, weights=area * f0[:, j], minlength=k)
                              for j in range(f0.shape[1])]) / node_area[:, None]
        P = np.vstack([nxy, kriging.xy])
        layout = (exact_max_nodes, node, f, k, node_area, fn, cdist(P, P))
        if cache is not None:
            cache.exact_layout = layout
    _, node, f, k, node_area, fn, DP = layout
    jitter = 1e-10 * (vg.sill + vg.nugget) + 1e-12
    if cache is None:
        Kj = vg.covariance(DP)
        Kj[np.diag_indices(len(DP))] += jitter
        Lj = sla.cholesky(Kj, lower=True, check_finite=False)
        C = Kj[:k, k:]
        s_scale = 1.0
    else:
        fkey = (*lens, share_of(vg))
        pair = cache.factors.get(fkey)
        if pair is None:
            # Unit sill: the factor scales by sqrt(sill) and the covariances by sill.
            R1 = covariance_blocked(vg.family, DP, vg.len_scale, 1.0)
            R1[np.diag_indices(len(DP))] += jitter / vg.sill
            pair = (sla.cholesky(R1, lower=True, check_finite=False, overwrite_a=True),
                    covariance_blocked(vg.family, DP[:k, k:], vg.len_scale, 1.0))
            if fkey in cache.keep and len(cache.factors) < cache.max_factors:
                cache.factors[fkey] = pair
        Lj, C1 = pair
        C = C1 * vg.sill
        s_scale = root_scale
    est = fn @ kriging.beta + C @ kriging.dual
    out = np.empty((n, k))
    for start in range(0, n, batch):
        b = min(batch, n - start)
        S = (Lj @ rng.standard_normal((len(DP), b))).T  # (b, k + n_casts)
        if s_scale != 1.0:
            S *= s_scale
        X = (S[:, k:] + sd_nug * rng.standard_normal((b, n_casts))).T
        block = S[:, :k] + est[None, :]
        block -= (C @ (Q @ X) + fn @ (R.T @ X)).T
        out[start:start + b] = block
    return Realizations(values=out, node_of_cell=node if f > 1 else None, node_area=node_area,
                        method="exact", node_km=f * cell, clipped_share=emb.clipped_share)
