"""Conditional simulation: checks whose truth is known by construction (Monte Carlo,
fixed seeds; bands several Monte Carlo standard errors wide)."""

import numpy as np
import pytest
from scipy.spatial.distance import cdist

from coldindex.indices import area_below
from coldindex.interpolate import (
    DrawCache,
    Kriging,
    Variogram,
    _cast_stencils,
    _even_spectrum,
    circulant_embedding,
    conditional_realizations,
    refinement,
    share_of,
    unconditional_fields,
    weighted_summaries,
)

NY, NX, CELL = 30, 40, 5.0
GX = CELL * (np.arange(NX) + 0.5)
GY = CELL * (np.arange(NY) + 0.5)


def test_unconditional_fields_have_the_model_covariance():
    vg = Variogram("exponential", 0.6, 25.0, 0.0)
    emb = circulant_embedding((NY, NX), CELL, vg)
    assert emb.clipped_share == 0.0
    f = unconditional_fields(emb, 4000, np.random.default_rng(1))
    # Variance at every cell = sill; estimator: sample variance over 4000 fields
    # (standard error about sill * sqrt(2/4000) = 2.2 %).
    var = f.var(axis=0)
    assert var.mean() == pytest.approx(0.6, rel=0.02)
    # Covariance at lag 2 cells along x = C(10 km).
    lag = (f[:, :, :-2] * f[:, :, 2:]).mean()
    assert lag == pytest.approx(vg.covariance(10.0), rel=0.04)
    # Independent real and imaginary parts: fields 0 and 1 uncorrelated.
    r = np.corrcoef(f[0::2].ravel(), f[1::2].ravel())[0, 1]
    assert abs(r) < 0.01


def test_embedding_clips_and_reports_long_range():
    vg = Variogram("exponential", 1.0, 500.0, 0.0)
    emb = circulant_embedding((NY, NX), CELL, vg, pad_cap=2.0)
    assert 0.0 < emb.clipped_share < 0.05


@pytest.fixture(scope="module")
def sims():
    rng = np.random.default_rng(5)
    iy = rng.integers(0, NY, 50)
    ix = rng.integers(0, NX, 50)
    pos = np.unique(np.column_stack([iy, ix]), axis=0)
    xy = np.column_stack([GX[pos[:, 1]], GY[pos[:, 0]]])  # casts on grid nodes
    z = 1.0 + np.sin(xy[:, 0] / 40.0) + rng.normal(0, 0.1, len(xy))
    vg = Variogram("exponential", 0.5, 30.0, 0.01)
    kr = Kriging(xy, z, vg)
    mask = np.ones((NY, NX), bool)
    mask[:5, :8] = False  # an irregular domain
    real = conditional_realizations(kr, GX, GY, mask, np.full(mask.sum(), CELL**2), 3000,
                                    np.random.default_rng(9))
    assert real.method == "circulant" and real.node_of_cell is None
    out = real.values
    xx, yy = np.meshgrid(GX, GY)
    cells = np.column_stack([xx[mask], yy[mask]])
    est, var, _ = kr.predict(cells)
    return kr, out, est, var, cells, pos, mask


def test_realizations_reproduce_casts_up_to_nugget(sims):
    kr, out, _, _, _, pos, mask = sims
    index = np.full(mask.shape, -1)
    index[mask] = np.arange(mask.sum())
    at = index[pos[:, 0], pos[:, 1]]
    ok = at >= 0
    dev = out[:, at[ok]] - kr.z[ok]
    # The smooth process at a cast differs from the reading by at most the nugget's spread.
    assert np.sqrt(np.mean(dev**2)) < 1.5 * np.sqrt(kr.vg.nugget)


def test_simulation_mean_and_variance_match_kriging(sims):
    _, out, est, var, _, _, _ = sims
    n = out.shape[0]
    # Mean: within 5 Monte Carlo standard errors at every cell.
    assert np.all(np.abs(out.mean(axis=0) - est) < 5 * np.sqrt(var / n) + 1e-9)
    # Variance: the average ratio within 3 %.
    assert out.var(axis=0).mean() / var.mean() == pytest.approx(1.0, abs=0.03)


def test_simulated_area_approaches_expected_area(sims):
    _, out, est, var, _, _, mask = sims
    area = np.full(mask.sum(), CELL * CELL)
    for t in (0.5, 1.0, 1.8):
        expected = area_below(est, np.sqrt(var), area, t)
        simulated = (out < t).astype(float) @ area
        se = simulated.std() / np.sqrt(len(simulated))
        assert simulated.mean() == pytest.approx(expected, abs=4 * se + 1.0)


def _block_kriging_sd(kr, cells, area):
    """Exact SD of the domain-mean error from the weights: a^T Var(Y - W Z) a / A^2."""

    W = kr.weights(cells)
    Ccc = kr.vg.covariance(cdist(cells, cells))
    Ccz = kr.vg.covariance(cdist(cells, kr.xy))
    a = area / area.sum()
    wa = W.T @ a
    return float(np.sqrt(a @ Ccc @ a - 2 * wa @ (Ccz.T @ a) + wa @ kr.K @ wa))


@pytest.mark.parametrize("family", ["exponential", "matern"])
@pytest.mark.parametrize("share", [0.5, 1.0])
def test_long_range_simulation_is_exact(family, share):
    # Length scales of 0.5 and 1 domain width: the 2.5x embedding would clip, so the exact
    # simulation must take over. Truth by construction: per-cell variance of the
    # realizations = kriging variance, SD of the domain mean = the exact block-kriging SD.
    width = NX * CELL
    vg = Variogram(family, 1.0, share * width, 0.02)
    assert circulant_embedding((NY, NX), CELL, vg).clipped_share > 1e-6
    rng = np.random.default_rng(11)
    xy = rng.uniform([0, 0], [width, NY * CELL], size=(40, 2))
    z = rng.normal(0, 1, 40)
    kr = Kriging(xy, z, vg)
    mask = np.ones((NY, NX), bool)
    mask[:6, :10] = False
    area = np.full(mask.sum(), CELL**2)
    real = conditional_realizations(kr, GX, GY, mask, area, 2000, np.random.default_rng(3))
    assert real.method == "exact" and real.clipped_share > 1e-6
    xx, yy = np.meshgrid(GX, GY)
    cells = np.column_stack([xx[mask], yy[mask]])
    _, var, _ = kr.predict(cells)
    ratio = np.median(real.values.var(axis=0, ddof=1) / var)
    assert 0.9 <= ratio <= 1.1
    means, _ = real.summaries([0.0])
    assert 0.9 <= means.std(ddof=1) / _block_kriging_sd(kr, cells, area) <= 1.1


def test_exact_fallback_on_blocks_of_cells():
    # More active cells than exact nodes: blocks of cells carry their summed areas.
    vg = Variogram("exponential", 1.0, NX * CELL, 0.02)
    rng = np.random.default_rng(12)
    xy = rng.uniform([0, 0], [NX * CELL, NY * CELL], size=(30, 2))
    kr = Kriging(xy, rng.normal(0, 1, 30), vg)
    mask = np.ones((NY, NX), bool)
    area = np.full(mask.sum(), CELL**2)
    real = conditional_realizations(kr, GX, GY, mask, area, 20, np.random.default_rng(1),
                                    exact_max_nodes=300)
    assert real.method == "exact" and real.node_of_cell is not None
    assert real.values.shape[1] <= 300
    assert real.node_area.sum() == pytest.approx(area.sum())
    assert real.node_km == pytest.approx(2 * CELL)


def _direct_realizations(kr, gx, gy, mask, n, rng, drift_cells, batch):
    """The circulant simulation written out as a formula: est + S - W X, batch by batch."""
    vg = kr.vg
    cell = gx[1] - gx[0]
    r = refinement(vg.len_scale, cell)
    fine, half = cell / r, (r - 1) // 2
    fgx = gx[0] + fine * (np.arange(len(gx) * r) - half)
    fgy = gy[0] + fine * (np.arange(len(gy) * r) - half)
    emb = circulant_embedding((len(fgy), len(fgx)), fine, vg)
    xx, yy = np.meshgrid(gx, gy)
    cells = np.column_stack([xx[mask], yy[mask]])
    est, _, W = kr.predict(cells, drift_cells, return_weights=True)
    stencil, sk_w, sk_sd = _cast_stencils(kr.xy, fgx, fgy, vg)
    iy, ix = np.nonzero(mask)
    flat = (iy * r + half) * len(fgx) + ix * r + half
    out = []
    for start in range(0, n, batch):
        b = min(batch, n - start)
        S = unconditional_fields(emb, b, rng).reshape(b, -1)
        X = np.einsum("bnk,nk->bn", S[:, stencil], sk_w)
        X += np.sqrt(sk_sd**2 + vg.nugget) * rng.standard_normal((b, len(kr.z)))
        out.append(S[:, flat] + est[None, :] - X @ W.T)
    return np.vstack(out)


@pytest.mark.parametrize("vg", [Variogram("exponential", 0.5, 30.0, 0.01),
                                Variogram("spherical", 0.8, 12.0, 0.05)])  # refined lattice
def test_blocked_conditioning_equals_the_direct_formula(vg):
    # The one-pass conditioning over blocks of cells (with and without the cells x casts
    # distances given) gives the realizations of the formula, draw for draw, to 1e-10.
    rng = np.random.default_rng(21)
    xy = rng.uniform([0, 0], [NX * CELL, NY * CELL], size=(35, 2))
    depth = 50 + xy[:, 0]
    z = 1.0 + 0.01 * depth + rng.normal(0, 0.3, 35)
    kr = Kriging(xy, z, vg, depth)
    mask = np.ones((NY, NX), bool)
    mask[:4, :9] = False
    xx, yy = np.meshgrid(GX, GY)
    cells = np.column_stack([xx[mask], yy[mask]])
    dcells = 50 + cells[:, 0]
    area = np.full(mask.sum(), CELL**2)
    ref = _direct_realizations(kr, GX, GY, mask, 23, np.random.default_rng(4), dcells, 10)
    for dist in (None, cdist(cells, xy)):
        real = conditional_realizations(kr, GX, GY, mask, area, 23, np.random.default_rng(4),
                                        dcells, cell_dist=dist, batch=10)
        assert real.method == "circulant"
        np.testing.assert_allclose(real.values, ref, atol=1e-10)


def test_weighted_summaries_equal_plain_sums():
    # Blocks of realizations (more than one block here) give the plain sums exactly.
    rng = np.random.default_rng(8)
    values = rng.normal(size=(70, 1000))
    w = np.vstack([np.full(1000, 25.0), rng.uniform(0, 25, 1000), np.zeros(1000)])
    means, areas = weighted_summaries(values, w, [-0.5, 0.0, 1.0])
    assert areas.shape == (70, 3, 3) and means.shape == (70, 3)
    for j, t in enumerate([-0.5, 0.0, 1.0]):
        np.testing.assert_allclose(areas[:, :, j], np.array(
            [[np.sum(wr[v < t]) for wr in w] for v in values]), rtol=1e-12)
    np.testing.assert_allclose(means[:, :2], values @ w[:2].T / w[:2].sum(axis=1), rtol=1e-12)
    assert np.isnan(means[:, 2]).all()


@pytest.mark.parametrize("shape", [(8, 10), (9, 11), (60, 81)])
def test_embedding_spectrum_equals_the_complex_fft(shape):
    # Half a real FFT and its mirror equal the real part of the full complex FFT.
    import scipy.fft

    my, mx = shape
    ky = np.minimum(np.arange(my), my - np.arange(my)) * CELL
    kx = np.minimum(np.arange(mx), mx - np.arange(mx)) * CELL
    c = Variogram("matern", 1.0, 30.0, 0.0).covariance(np.hypot(ky[:, None], kx[None, :]))
    ref = scipy.fft.fft2(c).real
    np.testing.assert_allclose(_even_spectrum(c), ref, atol=1e-13 * np.abs(ref).max())


def test_pieces_shared_by_repeated_draws_change_nothing():
    # Parameter draws repeat a length scale and smooth share with another total variance:
    # the cached unit-sill embedding, stencils and exact factor, scaled, give the
    # realizations computed from scratch (circulant and exact paths), to 1e-10.
    rng = np.random.default_rng(31)
    xy = rng.uniform([0, 0], [NX * CELL, NY * CELL], size=(30, 2))
    z = rng.normal(1.0, 0.5, 30)
    mask = np.ones((NY, NX), bool)
    mask[:3, :7] = False
    area = np.full(mask.sum(), CELL**2)
    draws = [Variogram("exponential", 0.6, 20.0, 0.06),
             Variogram("exponential", 1.0, 400.0, 0.1),  # exact
             Variogram("exponential", 0.3, 20.0, 0.03),  # the first, half the variance
             Variogram("exponential", 1.0, 15.0, 0.2),
             Variogram("exponential", 2.0, 400.0, 0.2),  # the exact one, twice
             Variogram("exponential", 0.9, 20.0, 0.09),
             Variogram("exponential", 0.0, 20.0, 0.5)]  # a pure-nugget draw: nothing shared
    keys = [(vg.family, vg.len_scale, share_of(vg)) for vg in draws]
    cache = DrawCache()
    methods = []
    for i, vg in enumerate(draws):
        cache.keep = set(keys[i + 1:])
        kr = Kriging(xy, z, vg)
        got = conditional_realizations(kr, GX, GY, mask, area, 12, np.random.default_rng(i),
                                       cache=cache, exact_max_nodes=400)
        cache.prune()
        ref = conditional_realizations(kr, GX, GY, mask, area, 12, np.random.default_rng(i),
                                       exact_max_nodes=400)
        methods.append(got.method)
        np.testing.assert_allclose(got.values, ref.values, atol=1e-10)
        np.testing.assert_allclose(got.node_area, ref.node_area)
    assert methods.count("exact") == 2 and methods.count("circulant") == 5
    assert not cache.embeddings and not cache.stencils and not cache.factors  # all dropped


def test_unconditional_fields_equal_the_plain_fft2_of_the_same_draws():
    # The pruned two-pass transform and the reused draw buffers give the bytes of the
    # plain recipe: per thread's child generator, complex draws times the root, fft2.
    emb = circulant_embedding((NY, NX), CELL, Variogram("exponential", 0.7, 20.0, 0.0))
    got = unconditional_fields(emb, 7, np.random.default_rng(12))
    children = np.random.default_rng(12).spawn(2)
    my, mx = emb.root.shape
    ref = np.empty_like(got)
    for k in range(2):
        for i in list(range(0, 7, 2))[k::2]:
            eps = children[k].standard_normal((my, 2 * mx), dtype=np.float32).view(np.complex64)
            f = np.fft.fft2(eps * emb.root.astype(np.float32))[:NY, :NX]
            ref[i] = f.real
            if i + 1 < 7:
                ref[i + 1] = f.imag
    np.testing.assert_allclose(got, ref, atol=1e-5)  # float32 transforms of two libraries


def test_simulations_do_not_depend_on_how_many_os_threads_run_them():
    # --workers N pins every task to one thread; the draws must not change with it.
    from coldindex.interpolate import THREAD_LIMIT

    emb = circulant_embedding((NY, NX), CELL, Variogram("exponential", 0.7, 20.0, 0.0))
    two = unconditional_fields(emb, 9, np.random.default_rng(5))
    old = THREAD_LIMIT[0]
    THREAD_LIMIT[0] = 1
    try:
        one = unconditional_fields(emb, 9, np.random.default_rng(5))
    finally:
        THREAD_LIMIT[0] = old
    assert np.array_equal(one, two)
