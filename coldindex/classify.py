"""Cut values and year classes (cold / average / warm).

Cut values are given outright, read from an earlier ``cuts.json``, or derived by
a rule over a reference period: ``tercile`` (the 1/3 and 2/3 quantiles, numpy's
default linear interpolation, Hyndman & Fan type 7) or ``sd:K`` (mean ± K
standard deviations, ddof = 1). Direction: for temperatures lower is colder,
for cold-water areas larger is colder. A value equal to a cut value is average.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass

import numpy as np
import pandas as pd
from numpy.typing import ArrayLike
from scipy.special import ndtr

from coldindex.config import parse_rule
from coldindex.errors import InputError
from coldindex.schema import CUTS

CLASSES = ("cold", "average", "warm")


@dataclass(frozen=True)
class Cuts:
    """Cut values for one column.

    Attributes
    ----------
    column
        The column they were made for.
    low, high
        Lower and upper cut values, in the column's unit; ``low <= high``.
    rule
        ``tercile``, ``sd:K`` or ``given``.
    reference
        Reference period ``A-B`` (None when given outright).
    direction
        ``lower`` when lower values are colder, ``higher`` when higher are.
    """

    column: str
    low: float
    high: float
    rule: str
    reference: str | None
    direction: str

    def to_dict(self) -> dict:
        """JSON-ready dictionary (the ``cuts.json`` layout)."""
        return asdict(self)

    @classmethod
    def from_dict(cls, d: dict, source: str = "cuts file") -> Cuts:
        """Build from a ``cuts.json`` dictionary, refusing an incomplete one."""
        need = CUTS.names
        missing = [k for k in need if k not in d]
        if missing:
            raise InputError(f"{source} lacks {', '.join(missing)}; write it with coldindex "
                             "classify.")
        return cls(column=str(d["column"]), low=float(d["low"]), high=float(d["high"]),
                   rule=str(d["rule"]), reference=d["reference"], direction=str(d["direction"]))


def colder_direction(column: str) -> str:
    """Infer which direction is colder from the column's schema name.

    ``below_*_km2`` areas: ``higher``; ``*_c`` temperatures: ``lower``.
    """
    base = column.split("_lag")[0]
    if base.startswith("below_") and "_km2" in base:
        return "higher"
    for suffix in ("_c", "_c_map"):
        if base.endswith(suffix):
            return "lower"
    raise InputError(f"Cannot tell whether lower or higher values of {column!r} are colder; "
                     "say so with {option} lower|higher when classifying it, and give those "
                     "cut values (cuts.json) to the other stages.", option=("classify", "colder"))


def reference_values(years: ArrayLike, values: ArrayLike,
                     reference: tuple[int, int] | None) -> np.ndarray:
    """Finite values inside the reference period (the whole record when None)."""
    y = np.asarray(years)
    v = np.asarray(values, float)
    keep = np.isfinite(v)
    if reference is not None:
        keep &= (y >= reference[0]) & (y <= reference[1])
    return v[keep]


def cuts_by_rule(years: ArrayLike, values: ArrayLike, column: str, rule: str = "tercile",
                 reference: tuple[int, int] | None = None, direction: str | None = None
                 ) -> Cuts:
    """Derive cut values by a rule over a reference period.

    Parameters
    ----------
    years, values
        The yearly series.
    column
        Column name (recorded, and used to infer the direction).
    rule
        ``tercile`` or ``sd:K`` (e.g. ``sd:0.5``).
    reference
        Reference period (A, B), inclusive; None for the whole record.
    direction
        ``lower``/``higher`` colder; None infers it from the column name.

    Returns
    -------
    Cuts
        The cut values.
    """
    ref = reference_values(years, values, reference)
    if len(ref) < 3:
        raise InputError(f"The reference period holds {len(ref)} values of {column!r}; "
                         "cut values need at least 3.")
    k = parse_rule(rule)
    if k is None:
        low, high = (float(q) for q in np.quantile(ref, [1 / 3, 2 / 3]))
    else:
        mu, sd = float(np.mean(ref)), float(np.std(ref, ddof=1))
        low, high = mu - k * sd, mu + k * sd
    ref_text = f"{reference[0]}-{reference[1]}" if reference else None
    return Cuts(column, low, high, rule, ref_text, direction or colder_direction(column))


def classify(years: ArrayLike, values: ArrayLike, cuts: Cuts, sd: ArrayLike | None = None,
             reference: tuple[int, int] | None = None) -> pd.DataFrame:
    """Classify each year as cold, average or warm.

    Parameters
    ----------
    years, values
        The yearly series (NaN values get a blank class).
    cuts
        Cut values and direction.
    sd
        Optional standard deviation of each value; gives the class probabilities
        under a Gaussian error.
    reference
        Reference period for the anomaly and z (mean and SD, ddof = 1).

    Returns
    -------
    pandas.DataFrame
        ``year``, ``value``, ``class``, ``anomaly``, ``z`` and, with ``sd``,
        ``p_cold``, ``p_average``, ``p_warm``.
    """
    y = np.asarray(years)
    v = np.asarray(values, float)
    ref = reference_values(y, v, reference)
    mu = float(np.mean(ref))
    s = float(np.std(ref, ddof=1)) if len(ref) > 1 else float("nan")
    below, above = v < cuts.low, v > cuts.high
    colder_low = cuts.direction == "lower"
    cls = np.where(below, "cold" if colder_low else "warm",
                   np.where(above, "warm" if colder_low else "cold", "average"))
    cls = np.where(np.isfinite(v), cls, "")
    out = pd.DataFrame({"year": y, "value": v, "class": cls, "anomaly": v - mu,
                        "z": (v - mu) / s if s > 0 else np.nan})
    if sd is not None:
        e = np.asarray(sd, float)
        with np.errstate(divide="ignore", invalid="ignore"):
            p_low = np.where(e > 0, ndtr((cuts.low - v) / e), (v < cuts.low).astype(float))
            p_high = np.where(e > 0, ndtr((v - cuts.high) / e), (v > cuts.high).astype(float))
        # Probabilities are rounded to 1e-6: smaller ones are not meaningful.
        p_low, p_high = np.round(p_low, 6), np.round(p_high, 6)
        p_mid = np.round(1.0 - p_low - p_high, 6)
        out["p_cold"] = p_low if colder_low else p_high
        out["p_average"] = p_mid
        out["p_warm"] = p_high if colder_low else p_low
        out.loc[~np.isfinite(v) | ~np.isfinite(e), ["p_cold", "p_average", "p_warm"]] = np.nan
    return out
