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
