"""Fold states: independence of block size and merge order, serialization, and Chan-Golub-LeVeque.

Property tests (hypothesis) cut a table into random blocks, fold each into its own state,
optionally send states through ``to_bytes``/``from_bytes``, and merge them sequentially in a
random order or in a balanced tree.  The result must equal numpy's in-memory answer and the
one-block answer to about 1e-12 relative - times the condition number of the variance,
kappa = sqrt(1 + n mean^2 / S) of Chan, Golub and LeVeque (1983), since a merge updates the
co-moment with a mean difference that carries rounding of order eps * |mean|.  (Offsets stay at
most 1e3 here; the 1e6 case has its own explicit test at the end.)
"""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

import rankfold
from conftest import blocks_read, limit_for_blocks
from rankfold.folds import ColumnMoments, FeatureGram, FeatureProjection, SampleGram, tree_merge

PROPERTY = settings(max_examples=30, deadline=None)
RTOL = 1e-12


# ------------------------------------------------------------------ strategies


@st.composite
def tables(draw, max_rows=80, max_cols=7, min_rows=2):
    """A float64 table from a drawn seed: Gaussian, with random column offsets and spreads."""
    n = draw(st.integers(min_rows, max_rows))
    m = draw(st.integers(1, max_cols))
    seed = draw(st.integers(0, 2**32 - 1))
    offset = draw(st.sampled_from([0.0, 1.0, 1e3]))
    rng = np.random.default_rng(seed)
    x = rng.standard_normal((n, m)) * rng.uniform(0.1, 10.0, m) + offset * rng.uniform(-1, 1, m)
    return x


@st.composite
def partitions(draw, length, allow_empty=False):
    """Random cut points of ``range(length)`` into consecutive blocks."""
    lo = 0 if allow_empty else 1
    cuts = sorted(draw(st.lists(st.integers(lo, max(lo, length - 1)), max_size=min(12, length))))
    if not allow_empty:
        cuts = sorted(set(c for c in cuts if 0 < c < length))
    edges = [0] + cuts + [length]
    return list(zip(edges[:-1], edges[1:]))


merge_orders = st.sampled_from(["sequential", "shuffled", "tree", "tree-shuffled"])


def _combine(states, order, rng_seed):
    rng = np.random.default_rng(rng_seed)
    states = list(states)
    if order.endswith("shuffled"):
        rng.shuffle(states)
    if order.startswith("tree"):
        return tree_merge(states)
    acc = states[0]
    for s in states[1:]:
        acc = acc.merge(s)
    return acc


def _roundtrip(state, flag):
    return type(state).from_bytes(state.to_bytes()) if flag else state


def _rel_close(a, b, scale, rtol=RTOL):
    err = np.max(np.abs(np.asarray(a) - np.asarray(b))) if np.size(a) else 0.0
    assert err <= rtol * scale, f"error {err:.3e} exceeds {rtol:g} x {scale:.3e}"


# ------------------------------------------------------------------ FeatureGram


@PROPERTY
@given(data=st.data(), x=tables(), order=merge_orders, seed=st.integers(0, 1000))
def test_feature_gram_independent_of_blocks_and_merge_order(data, x, order, seed):
    n, m = x.shape
    parts = data.draw(partitions(n))
    trips = data.draw(st.lists(st.booleans(), min_size=len(parts), max_size=len(parts)))
    states = [_roundtrip(FeatureGram(m).update(x[a:b].copy(), a), t) for (a, b), t in zip(parts, trips)]
    merged = _roundtrip(_combine(states, order, seed), data.draw(st.booleans()))
    whole = FeatureGram(m).update(x.copy(), 0)

    assert merged.count == n
    # reference: numpy.mean and numpy.cov (two-pass, in memory)
    xc = x - x.mean(axis=0)
    ss = np.sum(xc * xc, axis=0)
    spread = max(float(np.max(ss)), 1e-300)
    # condition number of the variance (Chan, Golub & LeVeque 1983, eq. 1.5): sqrt(1 + n mean^2 / S)
    kappa = float(np.max(np.sqrt(1.0 + n * x.mean(axis=0) ** 2 / np.maximum(ss, 1e-300))))
    _rel_close(merged.mean, x.mean(axis=0), np.abs(x).max() + 1e-300)
    _rel_close(merged.comoment, np.cov(x, rowvar=False).reshape(m, m) * (n - 1), spread, rtol=10 * RTOL * kappa)
    # independence of blocking: same as the one-block state
    _rel_close(merged.comoment, whole.comoment, spread, rtol=RTOL * kappa)
    _rel_close(merged.covariance(), whole.covariance(), spread / (n - 1), rtol=RTOL * kappa)
    np.testing.assert_allclose(merged.comoment, merged.comoment.T, rtol=0, atol=RTOL * spread)


def test_feature_gram_update_ignores_empty_block():
    x = np.random.default_rng(0).standard_normal((10, 3))
    state = FeatureGram(3).update(x.copy()).update(np.empty((0, 3)), 10)
    assert state.count == 10
    # reference: numpy.cov
    np.testing.assert_allclose(state.covariance(), np.cov(x, rowvar=False), rtol=1e-13)


def test_feature_gram_merge_with_empty_state_either_way():
    x = np.random.default_rng(1).standard_normal((12, 4))
    full = FeatureGram(4).update(x.copy())
    left = FeatureGram(4).merge(FeatureGram(4).update(x.copy()))
    right = FeatureGram(4).update(x.copy()).merge(FeatureGram(4))
    for s in (left, right):
        assert s.count == 12
        np.testing.assert_array_equal(s.comoment, full.comoment)
        np.testing.assert_array_equal(s.mean, full.mean)


# ------------------------------------------------------------------ ColumnMoments with NaN


@PROPERTY
@given(data=st.data(), x=tables(min_rows=1), order=merge_orders, seed=st.integers(0, 1000),
       hole_rate=st.sampled_from([0.0, 0.1, 0.5, 0.95]))
def test_column_means_with_nan_independent_of_blocks(data, x, order, seed, hole_rate):
    n, m = x.shape
    rng = np.random.default_rng(seed)
    x = x.copy()
    x[rng.random(x.shape) < hole_rate] = np.nan
    parts = data.draw(partitions(n))
    trips = data.draw(st.lists(st.booleans(), min_size=len(parts), max_size=len(parts)))
    states = [_roundtrip(ColumnMoments(m).update(x[a:b].copy(), a), t) for (a, b), t in zip(parts, trips)]
    merged = _roundtrip(_combine(states, order, seed), data.draw(st.booleans()))

    present = ~np.isnan(x)
    # reference: numpy count of present values and numpy.nanmean
    np.testing.assert_array_equal(merged.count, present.sum(axis=0))
    for j in range(m):
        if present[:, j].any():
            ref = np.nanmean(x[:, j])
            _rel_close(merged.mean[j], ref, np.nanmax(np.abs(x[:, j])))
        else:
            assert merged.mean[j] == 0.0 and merged.count[j] == 0
    assert np.isfinite(merged.mean).all()


# ------------------------------------------------------------------ SampleGram and FeatureProjection


@PROPERTY
@given(data=st.data(), x=tables(max_rows=30, max_cols=16), order=merge_orders,
       seed=st.integers(0, 1000), standardize=st.booleans(), hole_rate=st.sampled_from([0.0, 0.2]))
def test_sample_gram_independent_of_blocks_and_merge_order(data, x, order, seed, standardize, hole_rate):
    n, m = x.shape
    x = x.copy()
    if hole_rate:
        # missing values (fill-mean): each feature's holes take its mean, i.e. 0 after centering
        holes = np.random.default_rng(seed).random(x.shape) < hole_rate
        holes[:2] = False  # every feature keeps two present values
        x[holes] = np.nan
    if standardize:
        x[0] += 1.0  # no constant columns: a constant column is refused under standardize
        x[1] -= 1.0
    xt = np.ascontiguousarray(x.T)  # (features, samples): blocks hold whole features
    parts = data.draw(partitions(m))
    trips = data.draw(st.lists(st.booleans(), min_size=len(parts), max_size=len(parts)))
    states = [_roundtrip(SampleGram(n, m, standardize).update(xt[a:b].copy(), a), t)
              for (a, b), t in zip(parts, trips)]
    merged = _roundtrip(_combine(states, order, seed), data.draw(st.booleans()))
    whole = SampleGram(n, m, standardize).update(xt.copy(), 0)

    # reference: NaN filled with numpy.nanmean, numpy centering (and numpy.std ddof=1) in memory,
    # then the Gram product
    mean = np.nanmean(x, axis=0)
    x = np.where(np.isnan(x), mean, x)
    scale = x.std(axis=0, ddof=1) if standardize else np.ones(m)
    xs = (x - mean) / scale
    ref = xs @ xs.T
    size = max(float(np.max(np.abs(ref))), 1e-300)
    assert merged.seen.all() and merged.standardize == standardize
    _rel_close(merged.gram, ref, size, rtol=1e-11)
    _rel_close(merged.gram, whole.gram, size)
    _rel_close(merged.center, mean, np.abs(x).max())
    np.testing.assert_allclose(merged.scale, scale, rtol=1e-12)
    np.testing.assert_allclose(merged.sumsq, np.sum(xs * xs), rtol=1e-11)


@PROPERTY
@given(data=st.data(), x=tables(max_rows=30, max_cols=16), k=st.integers(1, 3), seed=st.integers(0, 1000))
def test_feature_projection_independent_of_blocks(data, x, k, seed):
    n, m = x.shape
    rng = np.random.default_rng(seed)
    weights = rng.standard_normal((n, k))
    center, scale = x.mean(axis=0), rng.uniform(0.5, 2.0, m)
    xt = np.ascontiguousarray(x.T)
    parts = data.draw(partitions(m))
    states = [_roundtrip(FeatureProjection(weights, center, scale).update(xt[a:b].copy(), a), t)
              for (a, b), t in zip(parts, data.draw(st.lists(st.booleans(), min_size=len(parts),
                                                                max_size=len(parts))))]
    merged = tree_merge(states)
    # reference: numpy matmul on the whole centered, scaled table
    ref = ((x - center) / scale).T @ weights
    _rel_close(merged.loadings, ref, max(float(np.max(np.abs(ref))), 1e-300) * 10, rtol=1e-12)


def test_sample_gram_standardize_refuses_constant_feature_by_name():
    x = np.random.default_rng(0).standard_normal((3, 5))  # (features, samples)
    x[1] = 4.0
    state = SampleGram(5, 3, standardize=True)
    state.feature_names = ("a", "flat", "c")
    with pytest.raises(rankfold.DataError, match="flat"):
        state.update(x.copy(), 0)


def test_tree_merge_needs_a_state():
    with pytest.raises(ValueError):
        tree_merge([])


def test_to_bytes_is_lossless():
    x = np.random.default_rng(3).standard_normal((20, 4))
    for state in (FeatureGram(4).update(x.copy()), ColumnMoments(4).update(x.copy()),
                  SampleGram(20, 4, True).update(np.ascontiguousarray(x.T), 0)):
        back = type(state).from_bytes(state.to_bytes())
        for name in state._fields:
            np.testing.assert_array_equal(np.asarray(getattr(back, name)), np.asarray(getattr(state, name)))
            assert type(getattr(back, name)) is type(getattr(state, name)) or isinstance(getattr(state, name), np.ndarray)


# ------------------------------------------------------------------ Chan, Golub and LeVeque (1983)


def _cgl_table(n=4000, m=5, seed=1983):
    """Column means 1e6, unit spread, planted correlations.

    Every value lies in [5e5, 2e6], so ``x - 1e6`` is exact in float64 (Sterbenz's lemma):
    the shifted table is the same data, and its covariance can be taken accurately in memory.
    """
    rng = np.random.default_rng(seed)
    mix = np.eye(m) + 0.3 * rng.standard_normal((m, m))
    z = rng.standard_normal((n, m)) @ mix.T
    z /= z.std(axis=0)
    x = 1e6 + z
    shifted = x - 1e6
    assert np.array_equal(shifted + 1e6, x)  # the shift is exact
    # reference: numpy.cov on the data shifted (exactly) by 1e6 - no cancellation there
    return x, np.cov(shifted, rowvar=False)


def _rel_error(a, ref):
    return float(np.linalg.norm(a - ref) / np.linalg.norm(ref))


def _naive_raw_sums(x, blocks):
    """The textbook one-pass formula (sum x x^T - n mean mean^T) / (n - 1), folded in blocks."""
    m = x.shape[1]
    s1, s2, n = np.zeros(m), np.zeros((m, m)), 0
    for b in np.array_split(x, blocks):
        s1 += b.sum(axis=0)
        s2 += b.T @ b
        n += len(b)
    return (s2 - np.outer(s1, s1) / n) / (n - 1)


def test_chan_golub_leveque_feature_gram_many_blocks():
    x, ref = _cgl_table()
    states = [FeatureGram(x.shape[1]).update(b.copy()) for b in np.array_split(x, 64)]
    for order in ("sequential", "tree"):
        merged = _combine([FeatureGram.from_bytes(s.to_bytes()) for s in states], order, 0)
        err = _rel_error(merged.covariance(), ref)
        assert err < 1e-9, f"{order}: relative error {err:.2e}"
        # the mean is 1e6 + O(1e-2): absolute error must stay at the rounding of 1e6
        np.testing.assert_allclose(merged.mean - 1e6, x.mean(axis=0) - 1e6, atol=1e-8)
    # the naive formula on the same data is off by far more: the test can tell the difference
    naive = _rel_error(_naive_raw_sums(x, 64), ref)
    assert naive > 1e-6, f"naive raw sums unexpectedly accurate ({naive:.1e}); the test would not discriminate"


@pytest.mark.parametrize("route", ["features", "samples", "memory"])
def test_chan_golub_leveque_through_decompose(write_npy, route):
    x, ref = _cgl_table(n=3000 if route != "samples" else 300)
    m = x.shape[1]
    path = write_npy(x, "rows" if route != "samples" else "columns")
    samples_as = "rows" if route != "samples" else "columns"
    limit = {"features": "10KB", "memory": "2MB"}.get(route) or limit_for_blocks(
        path, route, m, rank=m, samples_as=samples_as)  # one feature per block
    res = rankfold.decompose(path, m, route=route, memory_limit=limit, samples_as=samples_as,
                             scores=route != "features")  # 10KB leaves no room for the scores' buffers
    if route == "features":
        assert blocks_read(res)[0] >= 20, blocks_read(res)
    if route == "samples":
        assert blocks_read(res) == [m, m], blocks_read(res)
    # covariance rebuilt from all components: L diag(variance) L^T
    rebuilt = (res.loadings * res.variance) @ res.loadings.T
    err = _rel_error(rebuilt, ref)
    assert err < 1e-9, f"{route}: relative error {err:.2e}"
    # reference: LAPACK via numpy.linalg.eigvalsh on the exactly shifted covariance
    np.testing.assert_allclose(res.variance, np.linalg.eigvalsh(ref)[::-1], rtol=1e-9)
    # the same 1e-9 as the covariance: Chan et al. bound the error by kappa * eps, kappa ~ mean/spread
    np.testing.assert_allclose(res.total_variance, np.trace(ref), rtol=1e-9)
    # and the naive formula would not have passed this check
    assert _rel_error(_naive_raw_sums(x, 30), ref) > 1e3 * 1e-9
