"""The spatial-outlier z is calibrated: fast version of benchmarks/outlier_false_flags.py."""

import numpy as np

from coldindex.fitting import fit_variogram
from coldindex.indices import standardized_loo
from coldindex.interpolate import Kriging, Variogram

SILL, LENGTH, NUGGET = 0.5, 60.0, 0.05  # degC², km, degC² (as in the benchmark)


def survey(rng: np.random.Generator, n_side: int = 11) -> tuple[np.ndarray, np.ndarray]:
    """An 11 x 11 lattice over 200 km: exponential field plus a nugget, known by construction."""
    g = np.linspace(0.0, 200.0, n_side)
    xy = np.array([(x, y) for y in g for x in g])
    d = np.hypot(xy[:, None, 0] - xy[None, :, 0], xy[:, None, 1] - xy[None, :, 1])
    cov = Variogram("exponential", SILL, LENGTH, 0.0).covariance(d)
    z = np.linalg.cholesky(cov + 1e-10 * np.eye(len(xy))) @ rng.standard_normal(len(xy))
    return xy, 1.0 + z + rng.normal(0.0, np.sqrt(NUGGET), len(xy))


def test_loo_z_is_standard_normal_on_clean_surveys_and_catches_a_raised_cast():
    rng = np.random.default_rng(2024)
    z2, z2_naive, caught = [], [], 0
    reps = 40
    for _ in range(reps):
        xy, z = survey(rng)  # truth by construction: exponential field plus a known nugget
        kr = Kriging(xy, z, fit_variogram(xy, z, "exponential", None).variogram)
        zs = standardized_loo(kr)
        z2.append(zs**2)
        err, var = kr.loo()
        # Naive: the smooth part's variance only (nugget left out) overstates every z.
        z2_naive.append(err**2 / np.maximum(var - kr.vg.nugget, 1e-12))
        zz = z.copy()
        zz[60] += 2.5  # the central cast, raised by 2.5 degC
        raised = Kriging(xy, zz, fit_variogram(xy, zz, "exponential", None).variogram)
        caught += bool(abs(standardized_loo(raised)[60]) > 4.0)
    z2 = np.concatenate(z2)
    # 4840 casts: mean z^2 of a standard normal is 1 (SE ~0.02 for independent z; the
    # LOO z of one year are mildly correlated, hence the band).
    assert 0.9 < z2.mean() < 1.1
    assert np.sum(z2 > 16.0) <= 2  # |z| > 4: 0.3 expected at the nominal 6.3e-5 per cast
    naive = np.mean(np.concatenate(z2_naive))
    assert naive > 1.3, naive  # the naive variance fails the band
    assert caught / reps >= 0.75  # 0.91 in the 1000-year benchmark
