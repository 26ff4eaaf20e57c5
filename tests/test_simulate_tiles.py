"""Tiles, automatic block sizes and the allocator setting: how the engine cuts its work.

None of these may change a number that the settings do not fix. The checks compare the
engine with itself (different cuts of the same work); the statistical checks against
outside references are in test_simulate_engine.py and test_simulate_moments.py.
"""
import sys
from dataclasses import replace

import pytest

import simulate.engine as engine
from simulate import (CHUNK_DRAWS, auto_block_draws, block_plan, retain_freed_memory,
                      run_resampling, tile_draws)
from tests.conftest import recipe_a
from tests.test_simulate_engine import LO_MV, _dump, _spec


def _rich_spec(n=8, **kw):
    mu, cov = recipe_a(n)
    settings = dict(draws=2 * CHUNK_DRAWS + 40, sweep_lengths=(36,), sweep_draws=130,
                    frontier_points=5, frontier_draws=60, self_check_draws=130)
    settings.update(kw)
    return _spec(mu, cov, [LO_MV, ("minv", "min-variance", {}, "sample", "ledoit-wolf-identity")],
                 **settings)


def test_tile_size_is_a_function_of_the_spec_alone():
    spec = _rich_spec(n=50)
    # 4 MiB / (8 bytes * (2 T N + (2 + 2 estimators) N^2)) = 4194304 / 176000 -> 23 draws
    assert tile_draws(spec, 120, "histories") == 4194304 // (8 * (2 * 120 * 50 + 4 * 2500))
    assert tile_draws(spec, 120, "moments") == 4194304 // (8 * 2 * 2500)
    assert tile_draws(_rich_spec(n=4), 120, "histories") == CHUNK_DRAWS   # small N: whole chunks
    assert tile_draws(_rich_spec(n=400), 120, "histories") == 1


def test_small_tiles_change_no_digit_across_blocks_and_workers(monkeypatch):
    """With tiles far smaller than a chunk (7 draws), block size and workers still change
    nothing: the tiles are cut by the spec, not by the scheduling."""
    monkeypatch.setattr(engine, "TILE_BYTES", 7 * 8 * (2 * 120 * 8 + 4 * 64))
    base = _rich_spec()
    assert tile_draws(base, 120, "histories") == 7
    first = run_resampling(replace(base, block_size=1000))
    assert first.to_summary()["resample"]["tile_draws"] == 7
    # a block computed with other tiles belongs to other numbers: the fingerprint says so
    fingerprint = base.fingerprint()
    monkeypatch.setattr(engine, "TILE_BYTES", 8 << 20)
    assert base.fingerprint() != fingerprint
    monkeypatch.setattr(engine, "TILE_BYTES", 7 * 8 * (2 * 120 * 8 + 4 * 64))
    ref = _dump(first)
    assert _dump(run_resampling(replace(base, block_size=CHUNK_DRAWS))) == ref
    assert _dump(run_resampling(replace(base, block_size=CHUNK_DRAWS), workers=2)) == ref


def test_tiles_draw_the_same_normal_histories_as_whole_chunks(monkeypatch):
    """The normal generator's stream is cut between tiles, not reordered: tiles of one draw
    and whole chunks see the same histories, so every statistic agrees to rounding (the
    shapes of the matrix products differ, hence the last bits only)."""
    base = replace(_rich_spec(), sweep_lengths=(), self_check_draws=0)
    whole = run_resampling(base).to_summary()["rules"]
    monkeypatch.setattr(engine, "TILE_BYTES", 1)
    assert tile_draws(base, 120, "histories") == 1
    # a new spec object: run_block keeps what it derived from the last one it saw
    tiled = run_resampling(replace(base)).to_summary()["rules"]
    for name in whole:
        a, b = whole[name]["population"], tiled[name]["population"]
        for key in ("expected_return_mean", "variance_mean", "ceq_mean", "sharpe_mean"):
            assert b[key] == pytest.approx(a[key], rel=1e-9, abs=1e-14), (name, key)
        assert b["prob_beats_equal_weight_ceq"] == a["prob_beats_equal_weight_ceq"]
        for asset, w in whole[name]["weights"].items():
            assert tiled[name]["weights"][asset]["mean"] == pytest.approx(w["mean"], rel=1e-9,
                                                                          abs=1e-12)


def test_automatic_blocks_are_whole_chunks_sized_by_the_work():
    small = _rich_spec(n=4, draws=200_000, attribution=False)
    large = _rich_spec(n=200, draws=200_000, attribution=False)
    for spec in (small, large):
        assert spec.block_size == 0 and spec.block_draws == auto_block_draws(spec)
        assert spec.block_draws % CHUNK_DRAWS == 0
    assert small.block_draws == engine.MAX_BLOCK_DRAWS          # cheap draws: the cap
    assert CHUNK_DRAWS <= large.block_draws < small.block_draws  # costly draws: fewer per block
    # MIN_BLOCKS blocks where each still holds MIN_BLOCK_SECONDS of (modelled) work
    costly = _rich_spec(n=60, draws=8_000, sweep_lengths=(), self_check_draws=0)
    sizes = [b.stop - b.start for b in block_plan(costly)]
    assert costly.block_draws == 500 and sum(sizes) == 8_000
    # the frontier draws (the first 60: one chunk, some 1.7 s of modelled work at N = 60) in
    # a block of their own; then full blocks, and the last 750 draws halve towards the end
    assert sizes == [125] + [500] * 15 + [250, 125]
    assert all(s % CHUNK_DRAWS == 0 for s in sizes)
    # more frontier draws: blocks of about BLOCK_SECONDS of modelled work (one chunk here)
    sizes = [b.stop - b.start for b in block_plan(replace(costly, frontier_draws=1000))]
    assert sizes[:9] == [125] * 8 + [500] and sum(sizes) == 8_000
    # at 4 assets a frontier draw is cheaper: two chunks per block
    cheap = _rich_spec(n=4, draws=2_000, sweep_lengths=(), self_check_draws=0,
                       frontier_draws=1000)
    assert [b.stop - b.start for b in block_plan(cheap)] == [250] * 4 + [1000]
    # an explicit size is taken as it is: no taper
    assert [b.stop - b.start for b in block_plan(replace(costly, block_size=500))] == [500] * 16
    # a small, cheap study is not cut into blocks of a few milliseconds
    few = _rich_spec(n=4, draws=2_000, sweep_lengths=(), self_check_draws=0)
    assert len(block_plan(few)) == 1
    tiny = _rich_spec(n=4, draws=100, sweep_lengths=(), self_check_draws=0)
    assert tiny.block_draws == CHUNK_DRAWS and len(block_plan(tiny)) == 1
    # an explicit size wins, rounded up to chunks
    assert replace(small, block_size=300).block_draws == 3 * CHUNK_DRAWS
    # and the size never reaches the numbers
    assert _dump(run_resampling(few)) == _dump(run_resampling(replace(few, block_size=125)))


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="glibc's mallopt")
def test_retain_freed_memory_applies_once_on_glibc():
    import platform

    first = retain_freed_memory()
    assert retain_freed_memory() is first          # asked once per process
    if platform.libc_ver()[0] == "glibc":
        assert first is True


def test_tapered_automatic_plan_changes_no_digit():
    spec = _rich_spec(n=8, draws=4_000, sweep_lengths=(), self_check_draws=0, frontier_points=0)
    sizes = [b.stop - b.start for b in block_plan(spec)]
    assert sizes == [2000, 1000, 500, 250, 125, 125]
    ref = _dump(run_resampling(replace(spec, block_size=CHUNK_DRAWS)))
    assert _dump(run_resampling(spec)) == ref
    assert _dump(run_resampling(spec, workers=2)) == ref


def test_block_seconds_follow_the_cost_model_block_by_block():
    """The modelled cost of each block (what batch runners group tasks by): its draws at
    the per-draw model, at the block's own history length, plus the frontier model for
    each draw of the block that traces frontiers (the first ``frontier_draws`` main
    draws); the plan's blocks add up to the whole study's model."""
    spec = _rich_spec(n=30).resolved()
    plan = block_plan(spec)
    per_draw = {t: engine._draw_micros(spec, t) for t in (120, 36)}
    front = engine._frontier_micros(spec)
    for b in plan:
        draws = b.stop - b.start
        traced = max(0, min(b.stop, 60) - b.start) if b.part == "main" else 0
        expected = (draws * per_draw[b.length] + traced * front) / 1e6
        assert engine.block_seconds(spec, b) == pytest.approx(expected, rel=1e-12)
    main = [b for b in plan if b.part == "main"]
    assert engine.block_seconds(spec, main[0]) > 5 * engine.block_seconds(spec, main[-1])
    total = sum(engine.block_seconds(spec, b) for b in plan)
    whole = (spec.draws * per_draw[120] + 60 * front + spec.self_check_draws * per_draw[120]
             + spec.n_sweep_draws * per_draw[36]) / 1e6
    assert total == pytest.approx(whole, rel=1e-12)
    # no frontier rule traced: no frontier cost
    flat = replace(spec, frontier_points=0)
    assert engine.block_seconds(flat, main[0]) == pytest.approx(
        (main[0].stop - main[0].start) * per_draw[120] / 1e6, rel=1e-12)
