"""Variogram estimation: restricted / plain maximum likelihood and weighted least squares.

Every fit method is one function in :data:`FIT_METHODS`; choices, help text and
docs derive from that registry.

Likelihood fits (``reml``, the default, and ``ml``) use the Gaussian model of the
casts, ``z = F beta + e`` with ``Cov(e) = s * V``, ``V = w * R(h / len) + (1 - w) * I``:
``s`` is the total variance (partial sill plus nugget), ``w`` the share of the
smooth process and ``R`` the family's correlation (:func:`coldindex.interpolate.correlation`).
The drift coefficients ``beta`` (a constant, plus depth or other external drift)
and ``s`` are profiled out in closed form, so the numerical search is over the
length scale and ``w`` only. The restricted likelihood (Patterson & Thompson
1971; Harville 1977, eq. 3.5) is

    -2 l_R = (n - p) log(q / (n - p)) + log|V| + log|F^T V^-1 F| + const,

with ``q = (z - F beta)^T V^-1 (z - F beta)`` at the generalised-least-squares
``beta``; the plain likelihood drops ``log|F^T V^-1 F|`` and uses ``n``.

Parameter uncertainty (:func:`draw_variograms`): the same profiled restricted
likelihood, evaluated on a grid laid along the principal axes of its curvature at
the optimum (four standard deviations each way), is the marginal posterior of
``(log len, w)`` under a flat prior on those two, a flat prior on ``beta`` and
``1/s`` on ``s`` (Diggle & Ribeiro 2007, sect. 7.2.2; Kitanidis 1986); given
``(len, w)`` the posterior of ``s`` is scaled inverse chi-square with ``n - p``
degrees of freedom and scale ``q / (n - p)``. Draws from this discrete posterior
carry the variogram's uncertainty into the conditional simulations.

All distances are in km (fits are robust in km, fragile in metres).

References
----------
Patterson, H. D. & Thompson, R. (1971). Recovery of inter-block information when
block sizes are unequal. Biometrika 58, 545-554.
Harville, D. A. (1977). Maximum likelihood approaches to variance component
estimation and to related problems. J. Am. Stat. Assoc. 72, 320-338.
Kitanidis, P. K. (1986). Parameter uncertainty in estimation of spatial
functions: Bayesian analysis. Water Resour. Res. 22, 499-507.
Diggle, P. J. & Ribeiro, P. J. (2007). Model-based Geostatistics. Springer, ch. 5-7.
Cressie, N. (1985). Fitting variogram models by weighted least squares.
Mathematical Geology 17, 563-586.
"""

from __future__ import annotations

import warnings
from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy.linalg.lapack import dpotrf as _potrf
from scipy.linalg.lapack import dpotrs as _potrs
from scipy.linalg.lapack import dtrtrs as _trtrs
from scipy.optimize import minimize
from scipy.spatial import cKDTree
from scipy.spatial.distance import cdist

from coldindex.errors import TooFewDataError
from coldindex.interpolate import FAMILIES, Variogram, correlation_inplace, drift_matrix

FloatArray = NDArray[np.float64]

#: Bounds of the length scale, relative to the casts' station spacing (low) and
#: the diagonal of their bounding box (high).
LEN_LOW_SPACINGS = 0.25
LEN_HIGH_DIAGONALS = 3.0
#: The Gaussian family needs a nugget to be solved and simulated: at least 1 % of the variance.
GAUSSIAN_MIN_NUGGET_SHARE = 0.01
_JITTER = 1e-8


@dataclass(frozen=True)
class Posterior:
    """Discrete posterior of the variogram parameters on a grid around the optimum.

    Attributes
    ----------
    len_scale
        Length scale at each grid point. [km]
    smooth_share
        Share ``w`` of the smooth process in the total variance at each point.
    scale
        ``q / (n - p)``: the scale of the total variance's posterior at each point. [°C²]
    prob
        Posterior probability of each grid point (sums to 1).
    dof
        Degrees of freedom ``n - p``.
    """

    len_scale: FloatArray
    smooth_share: FloatArray
    scale: FloatArray
    prob: FloatArray
    dof: int


@dataclass(frozen=True)
class Fit:
    """A fitted variogram with what the fit knows about itself.

    Attributes
    ----------
    variogram
        The point estimate.
    method
        Fit method (a key of :data:`FIT_METHODS`, or ``fixed`` for given parameters).
    at_bound
        Human-readable notes for parameters that ended at an artificial bound.
    neg2loglik
        ``-2 log L`` (restricted for ``reml``) up to a constant; NaN for ``wls``.
    posterior
        Grid posterior for parameter draws (likelihood fits with ``posterior=True``).
    """

    variogram: Variogram
    method: str
    at_bound: tuple[str, ...] = ()
    neg2loglik: float = float("nan")
    posterior: Posterior | None = field(default=None, repr=False)

    def note(self) -> str:
        """One clause for the year's note, empty when no parameter is at a bound."""
        return "; ".join(self.at_bound)


def _spacing_and_diagonal(xy: FloatArray) -> tuple[float, float]:
    nn, _ = cKDTree(xy).query(xy, k=2)
    spacing = float(np.median(nn[:, 1]))
    diag = float(np.hypot(*np.ptp(xy, axis=0)))
    if not spacing > 0:
        spacing = max(diag / np.sqrt(len(xy)), 1e-3)
    return spacing, max(diag, spacing)


class _Profile:
    """The profiled (restricted) likelihood of one year's casts for one family."""

    def __init__(self, xy: FloatArray, z: FloatArray, F: FloatArray, family: str,
                 restricted: bool) -> None:
        self.D = cdist(xy, xy)
        self._buf = np.empty_like(self.D)  # the correlation matrix, then its factor
        self._fz = np.asfortranarray(np.column_stack([F, z]))
        self.z = z
        self.F = F
        self.family = family
        self.restricted = restricted
        self.n, self.p = F.shape
        self.dof = self.n - self.p if restricted else self.n
        spacing, diag = _spacing_and_diagonal(xy)
        # Search bounds: log length scale, and the smooth share w (the Gaussian family keeps
        # a nugget of at least GAUSSIAN_MIN_NUGGET_SHARE).
        self.ubounds = (float(np.log(LEN_LOW_SPACINGS * spacing)),
                        float(np.log(LEN_HIGH_DIAGONALS * diag)))
        self.w_hi = 1.0 - GAUSSIAN_MIN_NUGGET_SHARE if family == "gaussian" else 1.0

    def evaluate(self, len_scale: float, share: float) -> tuple[float, float]:
        """``-2 log L`` (profiled, up to a constant) and ``q / dof`` at one point.

        One Cholesky factorisation and one triangular solve with the drift and
        the data stacked, called through LAPACK directly into a buffer kept
        between evaluations (a search makes hundreds of them on the same casts).
        """
        n, p = self.n, self.p
        V = self._buf
        np.divide(self.D, len_scale, out=V)
        correlation_inplace(self.family, V)
        V *= share
        V.flat[:: n + 1] += (1.0 - share) + _JITTER
        # V is symmetric: its C-ordered memory is V itself in Fortran order.
        L, info = _potrf(V.T, lower=1, clean=0, overwrite_a=1)
        if info != 0:
            return float("inf"), float("nan")
        X, info = _trtrs(L, self._fz, lower=1)
        if info != 0:
            return float("inf"), float("nan")
        LiF, Liz = X[:, :p], X[:, p]
        G = LiF.T @ LiF
        cG, info = _potrf(G, lower=1, clean=1)
        if info != 0:
            return float("inf"), float("nan")
        beta, _ = _potrs(cG, LiF.T @ Liz, lower=1)
        r = Liz - LiF @ beta
        q = float(r @ r)
        if not q > 0:
            return float("inf"), float("nan")
        val = self.dof * np.log(q / self.dof) + 2.0 * np.sum(np.log(np.diagonal(L)))
        if self.restricted:
            val += 2.0 * np.sum(np.log(np.diagonal(cG)))
        return float(val), q / self.dof


def _likelihood_fit(xy: ArrayLike, values: ArrayLike, family: str, drift: ArrayLike | None,
                    restricted: bool, posterior: bool) -> Fit:
    xy = np.asarray(xy, float)
    z = np.asarray(values, float)
    F = drift_matrix(len(z), drift)
    if len(z) < F.shape[1] + 3:
        raise TooFewDataError(f"a likelihood fit needs at least {F.shape[1] + 3} casts, "
                              f"got: {len(z)}")
    if not np.ptp(z) > 0:
        raise TooFewDataError("The casts of this year are all equal; a variogram cannot be "
                              "fitted.")
    prof = _Profile(xy, z, F, family, restricted)
    (lo, hi), w_hi = prof.ubounds, prof.w_hi

    def objective(t: FloatArray) -> float:
        return prof.evaluate(float(np.exp(t[0])), float(t[1]))[0]

    # A coarse grid finds the basin; a bounded quasi-Newton search polishes it.
    starts = [(u, w) for u in np.linspace(lo, hi, 8) for w in (0.2, 0.6, 0.9, w_hi)]
    vals = [objective(np.array(s)) for s in starts]
    best = np.array(starts[int(np.argmin(vals))])
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        res = minimize(objective, best, method="L-BFGS-B", bounds=[(lo, hi), (0.0, w_hi)],
                       options={"maxiter": 200})
    t = res.x if res.fun <= min(vals) else best
    u, w = float(t[0]), float(np.clip(t[1], 0.0, w_hi))
    f0, s = prof.evaluate(float(np.exp(u)), w)
    if not np.isfinite(f0):
        raise TooFewDataError(f"the {family} likelihood fit did not converge")
    vg = Variogram(family=family, sill=w * s, len_scale=float(np.exp(u)),
                   nugget=(1.0 - w) * s)
    notes = []
    span = hi - lo
    if u <= lo + 1e-3 * span:
        notes.append(f"length scale at its lower bound ({np.exp(lo):.3g} km)")
    if u >= hi - 1e-3 * span:
        notes.append(f"length scale at its upper bound ({np.exp(hi):.3g} km)")
    if w <= 1e-3:
        notes.append("no spatial structure found (pure nugget)")
    if family == "gaussian" and w >= w_hi - 1e-4:
        notes.append("nugget at its lower bound (1 % of the variance)")
    post = _grid_posterior(prof, u, w) if posterior else None
    return Fit(variogram=vg, method="reml" if restricted else "ml", at_bound=tuple(notes),
               neg2loglik=f0, posterior=post)


def _hessian(prof: _Profile, u0: float, w0: float, hu: float = 0.1, hw: float = 0.04
             ) -> FloatArray:
    """Hessian of ``-log L`` in ``(log len, w)`` from a 3 x 3 finite-difference stencil.

    Near a bound the stencil's centre moves inside the bounds (a one-sided estimate).
    """
    (lo, hi), w_hi = prof.ubounds, prof.w_hi
    cu = float(np.clip(u0, lo + hu, hi - hu)) if hi - lo > 2 * hu else 0.5 * (lo + hi)
    cw = float(np.clip(w0, hw, w_hi - hw))
    f = np.empty((3, 3))
    for i, du in enumerate((-hu, 0.0, hu)):
        for j, dw in enumerate((-hw, 0.0, hw)):
            f[i, j] = prof.evaluate(float(np.exp(cu + du)), cw + dw)[0]
    huu = (f[2, 1] - 2 * f[1, 1] + f[0, 1]) / hu**2
    hww = (f[1, 2] - 2 * f[1, 1] + f[1, 0]) / hw**2
    huw = (f[2, 2] - f[2, 0] - f[0, 2] + f[0, 0]) / (4 * hu * hw)
    return 0.5 * np.array([[huu, huw], [huw, hww]])


def _grid_posterior(prof: _Profile, u0: float, w0: float, n_side: int = 11,
                    reach: float = 4.0) -> Posterior:
    """The profiled restricted likelihood on a grid around the optimum.

    The grid is laid along the principal axes of the inverse Hessian of
    ``-log L`` at the optimum, ``reach`` standard deviations along each, so it
    follows the ridge where log length scale and the smooth share are
    correlated; points outside the bounds are left out. Where the Hessian is not
    positive definite (a flat likelihood), the axes fall back to wide defaults.
    """
    (lo, hi), w_hi = prof.ubounds, prof.w_hi
    H = _hessian(prof, u0, w0)
    default = np.diag([1.5, 0.5]) / reach  # half-widths 1.5 in log len, 0.5 in w
    try:
        evals, evecs = np.linalg.eigh(H)
        ok = np.all(np.isfinite(evals)) and evals.min() > 0
    except np.linalg.LinAlgError:
        ok = False
    if ok:
        axes = evecs / np.sqrt(evals)[None, :]  # columns: one standard deviation along each axis
        # Never wider than the defaults, never narrower than a tenth of them.
        for k in range(2):
            scale = max(abs(axes[0, k]) / default[0, 0], abs(axes[1, k]) / default[1, 1])
            if scale > 1:
                axes[:, k] /= scale
    else:
        axes = default.copy()
    a = np.linspace(-reach, reach, n_side)
    A1, A2 = np.meshgrid(a, a, indexing="ij")
    pts = np.array([u0, w0])[:, None] + axes @ np.vstack([A1.ravel(), A2.ravel()])
    inside = (pts[0] >= lo) & (pts[0] <= hi) & (pts[1] >= 0.0) & (pts[1] <= w_hi)
    pts = np.hstack([np.array([[u0], [w0]]), pts[:, inside]])
    vals = np.empty(pts.shape[1])
    scales = np.empty(pts.shape[1])
    for k in range(pts.shape[1]):
        vals[k], scales[k] = prof.evaluate(float(np.exp(pts[0, k])), float(pts[1, k]))
    good = np.isfinite(vals)
    logp = np.where(good, -0.5 * (vals - np.min(vals[good])), -np.inf)
    prob = np.exp(logp)
    prob /= prob.sum()
    return Posterior(len_scale=np.exp(pts[0]), smooth_share=pts[1],
                     scale=np.where(good, scales, 1.0), prob=prob, dof=prof.n - prof.p)


def with_posterior(fit: Fit, xy: ArrayLike, values: ArrayLike, drift: ArrayLike | None = None
                   ) -> Fit:
    """The same fit with its parameter posterior tabulated (likelihood fits only).

    Parameters
    ----------
    fit
        A ``reml`` or ``ml`` fit of these casts.
    xy, values, drift
        The casts it was fitted to (positions [km], values [°C], drift).

    Returns
    -------
    Fit
        The fit with :attr:`Fit.posterior` set (unchanged for ``wls``).
    """
    if fit.posterior is not None or fit.method not in ("reml", "ml"):
        return fit
    xy = np.asarray(xy, float)
    z = np.asarray(values, float)
    F = drift_matrix(len(z), drift)
    vg = fit.variogram
    prof = _Profile(xy, z, F, vg.family, fit.method == "reml")
    (lo, hi), w_hi = prof.ubounds, prof.w_hi
    u0 = float(np.clip(np.log(vg.len_scale), lo, hi))
    total = vg.sill + vg.nugget
    w0 = float(np.clip(vg.sill / total if total > 0 else 0.0, 0.0, w_hi))
    post = _grid_posterior(prof, u0, w0)
    return Fit(variogram=vg, method=fit.method, at_bound=fit.at_bound,
               neg2loglik=fit.neg2loglik, posterior=post)


def fit_reml(xy: ArrayLike, values: ArrayLike, family: str, drift: ArrayLike | None = None,
             posterior: bool = False) -> Fit:
    """Restricted maximum likelihood fit of a variogram with a nugget.

    Parameters
    ----------
    xy
        Cast positions, (n, 2). [km]
    values
        Bottom temperatures. [°C]
    family
        Correlation family.
    drift
        External drift at the casts, (n,) or (n, k); its coefficients are
        estimated jointly (generalised least squares inside the likelihood).
    posterior
        Also tabulate the parameter posterior for :func:`draw_variograms`.

    Returns
    -------
    Fit
        The fitted variogram, bound notes and ``-2 log L_R``.

    References
    ----------
    Harville (1977), J. Am. Stat. Assoc. 72, 320-338, eq. 3.5; Diggle & Ribeiro
    (2007), Model-based Geostatistics, sect. 5.4.
    """
    return _likelihood_fit(xy, values, family, drift, True, posterior)


def fit_ml(xy: ArrayLike, values: ArrayLike, family: str, drift: ArrayLike | None = None,
           posterior: bool = False) -> Fit:
    """Plain maximum likelihood fit (biased low for the variance with a drift).

    Parameters and returns as :func:`fit_reml`; the parameter grid, when asked
    for, is tabulated from the plain likelihood (``reml`` gives the posterior
    the docs describe).
    """
    return _likelihood_fit(xy, values, family, drift, False, posterior)


def _gstools_model(family: str):
    import gstools as gs

    return {"exponential": gs.Exponential, "spherical": gs.Spherical,
            "gaussian": gs.Gaussian, "matern": gs.Matern}[family](dim=2)


def drift_residuals(values: ArrayLike, drift: ArrayLike | None) -> FloatArray:
    """Residuals of an ordinary least-squares fit of the drift (constant, plus columns)."""
    z = np.asarray(values, float)
    F = drift_matrix(len(z), drift)
    beta, *_ = np.linalg.lstsq(F, z, rcond=None)
    return z - F @ beta


def fit_wls(xy: ArrayLike, values: ArrayLike, family: str, drift: ArrayLike | None = None,
            posterior: bool = False, n_bins: int = 12) -> Fit:
    """Weighted least-squares fit to the empirical variogram (GSTools).

    The Matheron estimator is binned up to half the diagonal of the casts'
    bounding box (at least three station spacings); the model with a nugget is
    fitted by minimising ``sum_h N_h (gamma_hat(h) - gamma(h))^2``, each bin
    weighted by its pair count ``N_h`` (GSTools takes weights as ``1/sigma``, so
    ``sqrt(N_h)`` is passed). With a drift, the variogram is fitted to the
    ordinary-least-squares drift residuals. Bounds: length scale from half the
    station spacing to three times the largest lag, sill up to five times the
    residual variance, nugget up to twice it.

    Parameters and returns as :func:`fit_reml` (no posterior: ``posterior`` is
    ignored, and the simulations then use the point estimate).

    References
    ----------
    Cressie (1985), Mathematical Geology 17, 563-586 (weights ``N_h``, his
    simpler variant); Müller et al. (2022), Geosci. Model Dev. 15, 3161-3182.
    """
    import gstools as gs

    xy = np.asarray(xy, float)
    resid = drift_residuals(values, drift)
    var = float(np.var(resid))
    if not var > 0:
        raise TooFewDataError("The casts of this year are all equal; a variogram cannot be "
                              "fitted.")
    spacing, diag = _spacing_and_diagonal(xy)
    max_lag = max(0.5 * diag, 3.0 * spacing)
    edges = np.linspace(0.0, max_lag, n_bins + 1)
    centers, gamma, counts = gs.vario_estimate((xy[:, 0], xy[:, 1]), resid, edges,
                                               return_counts=True)
    use = counts > 0
    model = _gstools_model(family)
    bounds = {"var": (1e-6 * var, 5.0 * var), "len_scale": (0.5 * spacing, 3.0 * max_lag)}
    model.var_bounds = list(bounds["var"])
    model.len_scale_bounds = list(bounds["len_scale"])
    nug_lo = GAUSSIAN_MIN_NUGGET_SHARE * var if family == "gaussian" else 0.0
    model.nugget_bounds = [nug_lo, 2.0 * var]
    init = {"var": 0.8 * var, "len_scale": max_lag / 3.0, "nugget": max(0.2 * var, nug_lo)}
    select = {"nu": False} if family == "matern" else {}
    if family == "matern":
        model.nu = 1.5
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        for guess in (init, "default"):
            try:
                model.fit_variogram(centers[use], gamma[use],
                                    weights=np.sqrt(counts[use].astype(float)),
                                    init_guess=guess, loss="linear", max_eval=5000, **select)
                break
            except RuntimeError:
                continue
        else:
            raise TooFewDataError(f"the {family} variogram fit did not converge")
    vg = Variogram(family=family, sill=float(model.var), len_scale=float(model.len_scale),
                   nugget=float(model.nugget))
    notes = []
    for name, value, (blo, bhi) in (("length scale", vg.len_scale, bounds["len_scale"]),
                                    ("sill", vg.sill, bounds["var"])):
        if value >= bhi * (1 - 1e-3):
            notes.append(f"{name} at its upper bound ({bhi:.3g})")
        elif value <= blo * (1 + 1e-3):
            notes.append(f"{name} at its lower bound ({blo:.3g})")
    return Fit(variogram=vg, method="wls", at_bound=tuple(notes))


FitFunction = Callable[..., Fit]
#: Fit methods by name. ``reml`` is the default: unbiased for the variance with a
#: drift, and recovers the nugget and length scale where binned least squares does not.
FIT_METHODS: dict[str, FitFunction] = {"reml": fit_reml, "ml": fit_ml, "wls": fit_wls}


def fixed_fit(family: str, variogram: Variogram) -> Fit:
    """A given variogram in place of a fit (method ``fixed``): no estimation, no posterior.

    For benchmarks and sensitivity runs that hold the parameters of every year fixed.

    Parameters
    ----------
    family
        Correlation family the run uses (it replaces ``variogram.family``).
    variogram
        Partial sill [°C²], length scale [km] and nugget [°C²].

    Returns
    -------
    Fit
        ``method="fixed"``; the simulations use these parameters for every draw.
    """
    if family not in FAMILIES:
        raise ValueError(f"family needs to be one of {', '.join(FAMILIES)}, got: {family!r}")
    if not (variogram.sill > 0 and variogram.len_scale > 0 and variogram.nugget >= 0):
        raise ValueError("a fixed variogram needs sill > 0, len_scale > 0 and nugget >= 0, "
                         f"got: {variogram.describe()}")
    return Fit(variogram=Variogram(family=family, sill=variogram.sill,
                                   len_scale=variogram.len_scale, nugget=variogram.nugget),
               method="fixed")


def fit_variogram(xy: ArrayLike, values: ArrayLike, family: str,
                  drift: ArrayLike | None = None, method: str = "reml",
                  posterior: bool = False) -> Fit:
    """Fit a variogram by a registered method (see :data:`FIT_METHODS`).

    Parameters
    ----------
    xy
        Cast positions, (n, 2). [km]
    values
        Bottom temperatures. [°C]
    family
        Correlation family.
    drift
        Optional external drift at the casts.
    method
        ``reml`` (default), ``ml`` or ``wls``.
    posterior
        Tabulate the parameter posterior (likelihood methods).

    Returns
    -------
    Fit
        The fit.
    """
    if method not in FIT_METHODS:
        raise ValueError(f"method needs to be one of {', '.join(FIT_METHODS)}, got: {method!r}")
    return FIT_METHODS[method](xy, values, family, drift, posterior=posterior)


def draw_variograms(fit: Fit, k: int, rng: np.random.Generator) -> list[Variogram]:
    """Draw ``k`` variograms from the fit's parameter posterior.

    Grid points are drawn with their posterior probabilities; the total variance
    ``s`` of each draw is ``scale * dof / chi2(dof)`` (scaled inverse chi-square),
    split into partial sill ``w s`` and nugget ``(1 - w) s``. Without a posterior
    (``wls``) the point estimate is repeated.

    Parameters
    ----------
    fit
        A fit made with ``posterior=True``.
    k
        Number of draws.
    rng
        Random generator (seeded per year by the caller).

    Returns
    -------
    list of Variogram
        The draws.

    References
    ----------
    Diggle & Ribeiro (2007), Model-based Geostatistics, sect. 7.2.2 (the
    discrete prior for the correlation parameters).
    """
    post = fit.posterior
    if post is None or k < 1:
        return [fit.variogram] * max(k, 0)
    idx = rng.choice(len(post.prob), size=k, p=post.prob)
    s = post.scale[idx] * post.dof / rng.chisquare(post.dof, size=k)
    w = post.smooth_share[idx]
    return [Variogram(family=fit.variogram.family, sill=float(wi * si),
                      len_scale=float(post.len_scale[i]), nugget=float((1.0 - wi) * si))
            for i, wi, si in zip(idx, w, s, strict=True)]
