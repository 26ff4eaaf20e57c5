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


def test_histogram_percentiles_of_many_rows_at_once(rng):
    """``percentiles_rows`` (all assets in one pass, as the summary uses it) against numpy
    2.4's percentile(method="inverted_cdf") column by column, with a column of zeros, a
    column with values beyond the bins (None) and rows of very different totals."""
    from simulate.stats import WeightHistogram

    h = WeightHistogram(-0.5, 1.5, 0.001)
    x = np.column_stack([rng.normal(0.2, 0.3, 400), np.zeros(400),
                         np.where(rng.random(400) < 0.3, 0.0, rng.random(400)),
                         np.r_[rng.random(390), np.full(10, 9.0)]])
    counts = np.zeros((x.shape[1], h.n_columns), np.int64)
    K.bin_counts(x, h.low, h.width, h.n_bins, h.zero_tol, counts)
    counts = np.vstack([counts, np.zeros((1, h.n_columns), np.int64)])   # a row without draws
    qs = (0, 5, 25, 50, 75, 95, 99, 100)
    got = h.percentiles_rows(counts, qs, np.r_[x.min(axis=0), 0.0], np.r_[x.max(axis=0), 0.0])
    assert got[-1] == [None] * len(qs)
    for j in range(x.shape[1]):
        for q, g in zip(qs, got[j]):
            ref = np.percentile(x[:, j], q, method="inverted_cdf")
            if not h.low <= ref < h.low + h.width * h.n_bins:     # under- or overflow bin
                assert g is None, (j, q, g)
            else:
                assert abs(g - ref) <= 0.0005 + 1e-12, (j, q, g, ref)
    assert got[1] == [0.0] * len(qs)
    assert got[3][-1] is None and got[3][0] is not None


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


def _score_numpy(er, var, gamma):
    """The numpy form the score kernel replaced (reference for the bit-for-bit check)."""
    var = np.maximum(var, 0.0)
    vol = np.sqrt(var)
    with np.errstate(divide="ignore", invalid="ignore"):
        sharpe = np.where(vol > 0.0, er / np.where(vol > 0.0, vol, 1.0),
                          np.where(np.isnan(vol), np.nan, 0.0))
    out = np.empty((er.shape[0], 5))
    out[:, 0] = er
    out[:, 1] = var
    out[:, 2] = vol
    out[:, 3] = sharpe
    out[:, 4] = er - 0.5 * gamma * var
    return out


def test_score_columns_match_twin_and_numpy_bit_for_bit(rng):
    """Population metrics kernel: identical bits to the numpy form, including NaN rows
    (failed draws), zero and slightly negative variances and signed zeros; CEQ checked over
    many magnitudes so that a fused multiply-add would show."""
    d = 4000
    er = rng.normal(0.005, 0.01, d) * 10.0 ** rng.integers(-6, 3, d)
    var = rng.gamma(2.0, 0.001, d) * 10.0 ** rng.integers(-8, 3, d)
    var[:7] = [0.0, -0.0, -1e-19, np.nan, 0.0, 1e-300, -0.0]
    er[:7] = [0.01, -0.0, 0.02, np.nan, 0.0, 0.0, np.nan]
    for gamma in (3.0, 5.0, 1.0 / 3.0, 7.123456789):
        ref = _score_numpy(er, var, gamma)
        fast = K.score_columns(er, var, 0.5 * gamma, np.empty((d, 5)))
        slow = K.score_columns_py(er, var, 0.5 * gamma, np.empty((d, 5)))
        assert np.array_equal(fast.view(np.int64), ref.view(np.int64))
        assert np.array_equal(slow.view(np.int64), ref.view(np.int64))


def test_add_row_matches_twin_and_numpy_broadcast(rng):
    """x += row (the normal generator's mean shift): bit-identical to numpy's broadcast."""
    for n in (1, 10, 53):
        x = rng.normal(size=(300, n)) * 10.0 ** rng.integers(-5, 5, size=(300, n))
        row = rng.normal(size=n) * 10.0 ** rng.integers(-5, 5, size=n)
        ref = x.copy()
        ref += row
        fast = K.add_row(x.copy(), row)
        slow = K.add_row_py(x.copy(), row)
        assert np.array_equal(fast.view(np.int64), ref.view(np.int64))
        assert np.array_equal(slow.view(np.int64), ref.view(np.int64))


def test_beats_counts_match_twin_and_numpy(rng):
    """Counts of draws beating the reference rule: kernel, twin and the numpy form agree
    exactly, with failed (NaN) draws, exact ties and near-ties inside the tie margin."""
    from simulate.engine import TIE_RTOL, _beats, _beats_numpy

    d, r = 500, 4
    m = rng.normal(0.0, 0.01, size=(d, r, 5))
    m[:, :, 1] = np.abs(m[:, :, 1])
    m[::9, 2] = np.nan                                 # failed draws of rule 2
    m[::4, 3] = m[::4, 0]                              # exact ties with the reference
    m[1::4, 3, 4] = m[1::4, 0, 4] * (1 + 1e-12)        # inside the tie margin
    m[2::4, 3, 3] = m[2::4, 0, 3] + 1e-6               # clearly above
    for ref in (0, 1):
        want = _beats_numpy(m, m[:, ref])
        got = _beats(m, ref)
        twin = K.beats_counts_py(m, ref, TIE_RTOL, np.empty((r, 2), np.int64))
        np.testing.assert_array_equal(got, want)
        np.testing.assert_array_equal(twin, want)
        assert got[ref].tolist() == [0, 0]             # a rule never beats itself


def test_chan_fold_matches_pairwise_updates_bit_for_bit(rng):
    """Folding chunk moments in one kernel equals applying stats._chan chunk by chunk, to
    the bit, with empty chunks (count 0) and shapes (), (3,) and (2, 3, 4)."""
    from simulate.stats import _chan, _chan_fold

    for shape in ((), (3,), (2, 3, 4)):
        c = 17
        cn = rng.integers(0, 4, size=(c,) + shape).astype(np.float64) * 40.0
        cm = np.where(cn > 0, rng.normal(size=(c,) + shape) * 10.0 ** rng.integers(-6, 3, (c,) + shape), 0.0)
        c2 = np.where(cn > 0, rng.gamma(2.0, 1.0, size=(c,) + shape), 0.0)
        acc0 = (rng.integers(0, 3, size=shape).astype(float) * 125.0,
                rng.normal(size=shape), rng.gamma(2.0, 1.0, size=shape))
        ref = acc0
        for i in range(c):
            ref = _chan(ref, (cn[i], cm[i], c2[i]))
        got = _chan_fold(acc0, cn, cm, c2)
        twin = [np.array(x, dtype=np.float64).reshape(-1) for x in acc0]
        K.chan_fold_py(*twin, *(x.reshape(c, -1) for x in (cn, cm, c2)))
        for a, b, t in zip(got, ref, twin):
            assert a.shape == np.shape(b)
            assert np.array_equal(np.asarray(a).view(np.int64), np.asarray(b).view(np.int64))
            assert np.array_equal(t.view(np.int64), np.asarray(b).reshape(-1).view(np.int64))


def test_compiled_normals_are_numpys_numbers_and_state():
    """simulate._random draws exactly what Generator.standard_normal draws (numpy's ziggurat,
    compiled by numba), for each bit generator the engine or a user might pass, and leaves
    the generator in the same state, so draws after it continue the same stream."""
    from simulate import _random

    for bitgen in (np.random.SFC64, np.random.PCG64, np.random.Philox):
        for seed, shape in ((0, (1,)), (7, (125 * 120, 10)), (2026, (33, 17, 5))):
            a = np.random.Generator(bitgen(seed))
            b = np.random.Generator(bitgen(seed))
            fast = _random.standard_normal_into(a, np.empty(shape))
            slow = b.standard_normal(shape)
            np.testing.assert_array_equal(fast, slow)
            assert str(a.bit_generator.state) == str(b.bit_generator.state)
            np.testing.assert_array_equal(a.random(5), b.random(5))


def test_generators_draw_the_stream_in_documented_order():
    """The normal generator's histories are mean + z L' with z the first T N normals of
    the chunk's generator, in C order (what the README and DESIGN promise)."""
    from simulate.generators import NormalGenerator

    rng = np.random.default_rng(3)
    a = rng.normal(size=(4, 4))
    cov = a @ a.T + 4 * np.eye(4)
    mean = np.array([0.01, -0.02, 0.0, 0.03])
    gen = NormalGenerator(mean, cov)
    x = gen.draw(np.random.Generator(np.random.SFC64(5)), 3, 7)
    z = np.random.Generator(np.random.SFC64(5)).standard_normal((21, 4))
    np.testing.assert_allclose(x.reshape(21, 4), mean + z @ np.linalg.cholesky(cov).T,
                               rtol=1e-13, atol=1e-15)
