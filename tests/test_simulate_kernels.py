"""Compiled kernels of simulate/ against their plain-Python twins (house rule: every kernel
has an undecorated twin that a test compares it with)."""
import numpy as np

from simulate import _kernels as K


def test_stationary_indices_matches_twin(rng):
    n = 37
    starts = rng.integers(0, n, size=(20, 300))
    restart = rng.random((20, 300)) < 0.1
    fast = K.stationary_indices(starts, restart, n)
    slow = K.stationary_indices_py(starts, restart, n)
    np.testing.assert_array_equal(fast, slow)
    # by construction: a step either restarts at the drawn start or moves on by one, wrapping
    step = (fast[:, 1:] - fast[:, :-1]) % n
    moved = step == 1
    assert np.all(moved | restart[:, 1:])
    assert np.all(fast[:, 1:][restart[:, 1:]] == starts[:, 1:][restart[:, 1:]])
    assert np.all(fast[:, 0] == starts[:, 0])


def test_bin_counts_matches_twin_and_numpy(rng):
    x = rng.normal(0.2, 0.4, size=(500, 6))
    x[::7, 2] = 0.0                  # exact zeros go to the zero atom
    x[3, 1] = 5.0                    # overflow
    x[4, 1] = -5.0                   # underflow
    low, width, nb = -1.0, 0.01, 300
    a = np.zeros((6, nb + 3), np.int64)
    b = np.zeros((6, nb + 3), np.int64)
    K.bin_counts(x, low, width, nb, 1e-12, a)
    K.bin_counts_py(x, low, width, nb, 1e-12, b)
    np.testing.assert_array_equal(a, b)
    assert a.sum() == x.size
    # regular bins agree with numpy.histogram on the same edges (zeros excluded)
    for k in range(6):
        v = x[:, k][np.abs(x[:, k]) > 1e-12]
        h, _ = np.histogram(v, bins=low + width * np.arange(nb + 1))
        # numpy's last bin is closed on the right; ours sends the right edge to overflow
        np.testing.assert_array_equal(a[k, 1:nb], h[:-1])
    assert a[1, 0] == 1 and a[1, nb + 1] == 1
    assert a[2, nb + 2] == np.sum(x[:, 2] == 0.0)


def test_histogram_percentiles_within_half_a_bin_of_numpy():
    """WeightHistogram percentiles against numpy 2.4's percentile(method="inverted_cdf"),
    including exact zeros (a point mass), negative weights and values at the bin edges."""
    from hypothesis import given, settings, strategies as st

    from simulate.stats import WeightHistogram

    h = WeightHistogram(-3.0, 3.0, 0.001)
    values = st.one_of(st.just(0.0), st.floats(-2.9, 2.9, allow_nan=False),
                       st.sampled_from([-1.0, -0.001, 0.001, 0.5, 1.0]))

    @settings(max_examples=60, deadline=None)
    @given(st.lists(values, min_size=1, max_size=200))
    def check(xs):
        x = np.array(xs, dtype=np.float64)[:, None]
        counts = np.zeros((1, h.n_columns), np.int64)
        K.bin_counts(x, h.low, h.width, h.n_bins, h.zero_tol, counts)
        got = h.percentiles(counts[0], (5, 25, 50, 75, 95), float(x.min()), float(x.max()))
        for q, g in zip((5, 25, 50, 75, 95), got):
            ref = np.percentile(x[:, 0], q, method="inverted_cdf")
            assert abs(g - ref) <= 0.0005 + 1e-12, (q, g, ref)

    check()


def test_greedy_fill_kernel_matches_numpy_reference(rng):
    """optimise's compiled greedy vertex (cold starts of the batched QP) against the numpy
    reference ``optimise.constraints._greedy_fill``: identical to the last bit, with ties,
    signed zeros and bounds that bind."""
    from optimise import _kernels as OK
    from optimise.constraints import _greedy_fill
    from optimise.rules import _greedy_fill_fast

    twin = OK.plain_twin()["greedy_fill_rows"]
    for n, lower, upper in [
        (10, np.zeros(10), np.ones(10)),
        (7, np.zeros(7), np.full(7, 0.3)),
        (12, np.full(12, 0.02), np.linspace(0.1, 0.6, 12)),
        (5, np.array([0.0, -0.0, 0.1, 0.0, 0.2]), np.array([1.0, 0.25, 0.5, 0.0, 1.0])),
        (1, np.zeros(1), np.ones(1)),
    ]:
        score = rng.normal(size=(40, n))
        score[::3, : n // 2] = 0.5               # ties: the stable order decides
        score[1::5] = -0.0
        ref = _greedy_fill(score, lower, upper)
        fast = _greedy_fill_fast(score, lower, upper)
        left0 = 1.0 - lower.sum()
        cap = np.minimum(upper, lower + 1.0 - lower.sum())
        slow = np.empty_like(ref)
        twin(score, lower, cap, left0, slow)
        assert np.array_equal(fast.view(np.int64), ref.view(np.int64))   # bits, signed zeros
        assert np.array_equal(slow.view(np.int64), ref.view(np.int64))
        np.testing.assert_allclose(fast.sum(axis=1), 1.0, rtol=0, atol=1e-12)
        assert np.all(fast >= lower) and np.all(fast <= np.maximum(upper, lower))


def test_bartlett_factors_match_twin_and_numpy_indexing(rng):
    """The Bartlett-factor kernel against its twin and against the numpy construction it
    replaced (zeros, sqrt on the diagonal, normals at ``tril_indices(N, -1)``)."""
    for n in (1, 2, 5, 13):
        d = 9
        chi = rng.chisquare(np.arange(40.0, 40.0 - n, -1), size=(d, n))
        low = rng.standard_normal((d, n * (n - 1) // 2))
        fast = K.bartlett_factors(chi, low, np.full((d, n, n), np.nan))
        slow = K.bartlett_factors_py(chi, low, np.full((d, n, n), np.nan))
        ref = np.zeros((d, n, n))
        ii = np.arange(n)
        ref[:, ii, ii] = np.sqrt(chi)
        rows, cols = np.tril_indices(n, -1)
        ref[:, rows, cols] = low
        assert np.array_equal(fast, ref) and np.array_equal(slow, ref)


def test_symmetrize_half_matches_twin_and_numpy(rng):
    """(w + w') / 2 in place: bit-identical to ``w += w.T.copy(); w *= 0.5``."""
    for n in (1, 3, 17):
        w = rng.normal(size=(6, n, n)) * 10.0 ** rng.integers(-8, 8, size=(6, n, n))
        ref = w.copy()
        ref += ref.transpose(0, 2, 1).copy()
        ref *= 0.5
        fast = K.symmetrize_half(w.copy())
        slow = K.symmetrize_half_py(w.copy())
        assert np.array_equal(fast.view(np.int64), ref.view(np.int64))
        assert np.array_equal(slow.view(np.int64), ref.view(np.int64))
        assert np.array_equal(fast, fast.transpose(0, 2, 1))
