"""The resampling engine: blocks of draws, common random numbers, streaming statistics.

A study's work is a list of :class:`Block` objects fixed by the spec alone
(:func:`block_plan`). Three parts share one ``SeedSequence(seed)``:

* ``main`` (spawn key ``(0, c)`` for chunk ``c``): ``draws`` synthetic histories of
  ``length`` rows from the study's generator. Every rule (and every estimator) sees the
  same histories (common random numbers). Per rule: weights, population metrics,
  attribution runs; for the frontier rule, the frontiers of Broadie (1993).
* ``check`` (spawn key ``(1, c)``): the engine self-check against the closed form of
  Kan & Zhou (2007): normal histories of ``length`` rows from the population, the
  plug-in cash-budget mean-variance rule with the MLE covariance.
* ``sweep`` (spawn key ``(2 + k, c)`` for the k-th history length): ``sweep_draws``
  histories per length, each rule scored against 1/N.

Spawn key ``(p, c)`` is exactly ``SeedSequence(seed).spawn(...)[p].spawn(...)[c]``.
Every chunk of :data:`~simulate.stats.CHUNK_DRAWS` draws gets its own generator and is
processed on its own (estimators and the batched optimiser see exactly that chunk), and
its floating-point partial sums are merged in chunk order. So the results do not depend
on the block size, the number of workers or the order in which blocks finish.
"""
from __future__ import annotations

import contextlib
import hashlib
import io
import json
import math
import sys
from dataclasses import dataclass, field, replace
from typing import Any, Callable, Iterable, Mapping, Optional

import numpy as np

from estimators.core import DataError, InfeasibleError, NoiseproofError, SettingsError

from . import _kernels
from .generators import GENERATORS, NormalGenerator, SampleMoments, make_generator
from .stats import CHUNK_DRAWS, ChunkSums, WeightHistogram, chunk_moments, moments_mean_sd_se

__all__ = [
    "RuleSpec",
    "ResampleSpec",
    "Block",
    "BlockResult",
    "block_plan",
    "run_block",
    "merge_blocks",
    "run_resampling",
    "retain_freed_memory",
    "tile_draws",
    "auto_block_draws",
    "chunk_generator",
    "draw_path",
    "score",
    "METRICS",
    "PERCENTILES",
]

#: Population metrics of a per-draw allocation, in the order of the metric axis.
METRICS = ("expected_return", "variance", "volatility", "sharpe", "ceq")
#: Per-draw allocations kept per rule for the pack's cloud beside the frontiers.
CLOUD_DRAWS = 1000
#: Weight percentiles reported per asset.
PERCENTILES = (5, 25, 50, 75, 95)
#: Width of the weight histogram's bins (percentiles are exact to half of it).
WEIGHT_BIN = 0.001
_PART_MAIN, _PART_CHECK, _PART_SWEEP0 = 0, 1, 2


# --------------------------------------------------------------------------- specs

@dataclass(frozen=True)
class RuleSpec:
    """A rule with the estimator that feeds it.

    Attributes
    ----------
    rule : optimise.Rule
        Needs ``name``, ``type``, ``params``, ``needs_mean``, ``needs_covariance``,
        ``weights(mean, cov)`` and ``weights_batch(means, covs, warm=False)``.
    mean, covariance : str
        Estimator names (``estimators.MEAN_ESTIMATORS`` / ``COVARIANCE_ESTIMATORS``).
    params : dict
        Estimator parameters (e.g. ``{"ewma_half_life": 36}``); ``given_mean`` and
        ``given_covariance`` arrays are passed on to the estimators as such.
    """

    rule: Any
    mean: str = "sample"
    covariance: str = "sample"
    params: Mapping = field(default_factory=dict)

    @property
    def name(self) -> str:
        return self.rule.name

    def estimator_key(self):
        items = []
        for k in sorted(self.params):
            v = self.params[k]
            items.append((k, np.asarray(v).tobytes() if isinstance(v, np.ndarray) else v))
        return (self.mean, self.covariance, tuple(items))


@dataclass(frozen=True)
class ResampleSpec:
    """Everything a resampling run depends on (and nothing else).

    Attributes
    ----------
    population_mean : ndarray, shape (N,)
        Per-period mean of the population (excess returns when the history is excess).
    population_cov : ndarray, shape (N, N)
        Population covariance.
    history : ndarray, shape (T, N), or None
        The history the bootstrap generators resample (None with assumptions).
    assets : tuple of str
    rules : tuple of RuleSpec
        Must include the 1/N rule under the name ``equal-weight``.
    generator : str
        ``normal``, ``student-t``, ``bootstrap`` or ``block-bootstrap``.
    draws : int
        Synthetic histories in the main part.
    length : int
        Rows per synthetic history.
    seed : int
        Root of the study's ``SeedSequence``.
    risk_aversion : float
        The one gamma every rule is scored with (CEQ = mean - gamma / 2 variance).
    degrees_of_freedom, block_length : float or None
        Student-t degrees of freedom and stationary-bootstrap mean block length; None
        fits / chooses them from the history.
    block_size : int
        Draws per block (rounded up to whole chunks); memory and scheduling only. 0 (the
        default) sizes blocks from the study's work: see :func:`auto_block_draws`.
    keep_draws : bool
        Keep per-draw weights (``draw_arrays``).
    frontier_points : int
        Ranks along the frontier for Broadie's frontiers and the rank-matched average.
    frontier_rule : str or None
        Name of the rule whose estimator and constraints the frontiers use; None picks
        the first rule that uses means and covariances; frontiers are skipped when
        there is none or ``frontier_points < 2``.
    frontier_draws : int
        The frontiers use the first ``min(draws, frontier_draws)`` draws (one critical
        line run per draw).
    sweep_lengths : tuple of int
        History lengths (rows) of the sweep; empty skips it.
    sweep_draws : int or None
        Draws per sweep length (None: ``min(draws, 1000)``).
    attribution : bool
        Rerun the mean-using rules with the true mean / the true covariance.
    hold_threshold : float
        An asset counts as held in a draw when ``|w| > hold_threshold``.
    draw : str
        ``auto``, ``histories`` or ``moments`` (only ``histories`` is built here; ``auto``
        takes it).
    periods_per_year : int
        For the ``_annualised`` copies.
    self_check_draws : int
        Draws of the Kan & Zhou self-check (0 skips it).
    metric_sample : int
        Per-draw population metrics are kept for the first ``metric_sample`` draws, for
        the distribution tables (means and errors use all draws).
    policy : str or None
        Name of the rule the study holds today (the policy). When given, every rule is
        also compared with it draw by draw: the share of draws beating it on population
        CEQ and Sharpe ratio, and the population tracking error against it,
        ``sqrt((w - p)' Sigma (w - p))`` with both allocations from the same draw.
    """

    population_mean: np.ndarray
    population_cov: np.ndarray
    history: Optional[np.ndarray]
    assets: tuple
    rules: tuple
    generator: str
    draws: int
    length: int
    seed: int
    risk_aversion: float
    degrees_of_freedom: Optional[float] = None
    block_length: Optional[float] = None
    block_size: int = 0
    keep_draws: bool = False
    frontier_points: int = 21
    frontier_rule: Optional[str] = None
    frontier_draws: int = 1000
    sweep_lengths: tuple = ()
    sweep_draws: Optional[int] = None
    attribution: bool = True
    hold_threshold: float = 0.005
    draw: str = "auto"
    periods_per_year: int = 12
    self_check_draws: int = 2000
    metric_sample: int = 20000
    population_source: str = ""
    degrees_of_freedom_fitted: bool = False
    block_length_automatic: bool = False
    policy: Optional[str] = None

    # ---- derived, deterministic -------------------------------------------------------
    @property
    def n_assets(self) -> int:
        return int(self.population_mean.shape[0])

    @property
    def rule_names(self) -> tuple:
        return tuple(r.name for r in self.rules)

    @property
    def chunk_draws(self) -> int:
        return CHUNK_DRAWS

    @property
    def block_draws(self) -> int:
        """Draws per block: ``block_size`` rounded up to whole chunks (0: automatic)."""
        if self.block_size <= 0:
            return auto_block_draws(self)
        return int(math.ceil(self.block_size / CHUNK_DRAWS) * CHUNK_DRAWS)

    @property
    def n_sweep_draws(self) -> int:
        return int(self.sweep_draws) if self.sweep_draws is not None else min(self.draws, 1000)

    def resolved(self) -> "ResampleSpec":
        """The same spec with fitted degrees of freedom / automatic block length filled in."""
        changes = {}
        if self.generator == "student-t" and self.degrees_of_freedom is None:
            g = make_generator("student-t", mean=self.population_mean, cov=self.population_cov,
                               history=self.history)
            changes["degrees_of_freedom"] = float(g.degrees_of_freedom)
            changes["degrees_of_freedom_fitted"] = True
        if self.generator == "block-bootstrap" and self.block_length is None:
            g = make_generator("block-bootstrap", mean=self.population_mean,
                               cov=self.population_cov, history=self.history)
            changes["block_length"] = float(g.block_length)
            changes["block_length_automatic"] = True
        return replace(self, **changes) if changes else self

    def fingerprint(self) -> str:
        """SHA-256 of everything that determines the numbers (not block size or workers)."""
        h = hashlib.sha256()
        for arr in (self.population_mean, self.population_cov, self.history):
            h.update(b"none" if arr is None else np.ascontiguousarray(arr, np.float64).tobytes())
        rules = []
        for r in self.rules:
            rules.append([r.name, getattr(r.rule, "type", ""), _jsonable(getattr(r.rule, "params", {})),
                          r.mean, r.covariance, repr(r.estimator_key())])
        meta = [list(self.assets), rules, self.generator, self.draws, self.length, self.seed,
                self.risk_aversion, self.degrees_of_freedom, self.block_length, self.keep_draws,
                self.frontier_points, self.frontier_rule, self.frontier_draws,
                list(self.sweep_lengths), self.sweep_draws, self.attribution,
                self.hold_threshold, self.draw, self.self_check_draws, self.metric_sample,
                CHUNK_DRAWS, ["tile_bytes", TILE_BYTES]]   # tiles cut the random stream
        if self.policy is not None:    # appended only when set: older fingerprints hold
            meta.append(["policy", self.policy])
        meta.append(["numerics", NUMERICS])
        h.update(json.dumps(meta, default=str).encode())
        return h.hexdigest()


#: Version of the arithmetic behind a block's numbers, part of the fingerprint: raised
#: whenever a code change alters the numbers of the same study (even in the last bits), so
#: that ``--resume`` recomputes the blocks an older version wrote instead of merging them.
#: 2: the moments path's Wishart matrix from the triangles alone (``wishart_triangular``).
#: 3: normal and Student-t histories of 40 assets or more form ``Z L'`` by a triangular
#: product (``generators.times_factor_t``).
#: 4: the QP kernel's proximal-point steps (singular covariances) try the primal-dual
#: active-set phase first. Every check gave the same bits (its answer is the primal
#: method's when both end on the same working set), but a degenerate problem could end on
#: another working set, so older blocks are not merged with newer ones.
NUMERICS = 4

#: Seconds of one core's work an automatic block aims at: long enough that handing a block
#: to a worker and merging its result (about 1 ms) are small beside it, short enough that
#: the last blocks balance across workers and a crash loses little.
BLOCK_SECONDS = 0.25
#: Blocks per part an automatic size aims for at least (so that workers can share a study),
#: as long as each block still holds :data:`MIN_BLOCK_SECONDS` of work.
MIN_BLOCKS = 16
#: Shortest automatic block, in seconds of one core's work (a block is written to disk
#: with an fsync in a batch; a few milliseconds of work per block would be overhead).
MIN_BLOCK_SECONDS = 0.05
#: Largest automatic block, in draws (per-block memory with ``keep_draws``).
MAX_BLOCK_DRAWS = 10_000


def auto_block_draws(spec: "ResampleSpec") -> int:
    """Draws per block when ``block_size`` is automatic: a function of the spec alone.

    From a rough cost model of one draw on one core, fitted on the benchmark machine
    (history path, sample estimates, N from 5 to 200, T = 60, 120 and 240, one or three
    rules, with and without the attribution runs; about 11, 65 and 510 microseconds at
    N = 10, 50 and 200 with one mean-variance rule and T = 120; the model is within
    0.8x-1.3x of the measured cost, except that a long-only minimum-variance rule at
    N = 200 costs about twice what it says, and with a sample covariance from fewer rows
    than assets, whose optimisations take the proximal-point path, about five times):
    ``0.008 us * (T N + R' N^2) + 2 us * R'`` with ``R'`` the rules that use estimates
    (each counted three times with the attribution runs).
    The block holds about :data:`BLOCK_SECONDS` of that work, in whole chunks; less when
    that leaves a study fewer than :data:`MIN_BLOCKS` blocks to share among workers, but
    never less than :data:`MIN_BLOCK_SECONDS` of work; and at most
    :data:`MAX_BLOCK_DRAWS` draws. Block sizes never change a number; a faster or slower
    machine only makes blocks shorter or longer.
    """
    micros = _draw_micros(spec)
    target = int(BLOCK_SECONDS * 1e6 / micros) // CHUNK_DRAWS
    shortest = int(MIN_BLOCK_SECONDS * 1e6 / micros) // CHUNK_DRAWS
    by_count = math.ceil(spec.draws / MIN_BLOCKS / CHUNK_DRAWS)
    largest = max(spec.draws, spec.n_sweep_draws if spec.sweep_lengths else 0,
                  spec.self_check_draws)
    chunks = max(1, min(target, max(by_count, shortest), MAX_BLOCK_DRAWS // CHUNK_DRAWS,
                        math.ceil(largest / CHUNK_DRAWS)))     # no block beyond every part
    return chunks * CHUNK_DRAWS


def _draw_micros(spec: "ResampleSpec", length: Optional[int] = None) -> float:
    """Modelled microseconds of one ordinary draw on one core (see :func:`auto_block_draws`)."""
    n, t = spec.n_assets, spec.length if length is None else length
    solved = sum(1 for r in spec.rules if _uses_inputs(r)) * (3 if spec.attribution else 1)
    return 0.008 * (t * n + max(1, solved) * n * n) + 2.0 * max(1, solved)


def _frontier_micros(spec: "ResampleSpec") -> float:
    """Modelled extra microseconds of a draw that also traces the frontiers (critical line
    algorithm on the estimates, its portfolios scored under the population): ``450 + 47 N
    + 2.9 N^2``, fitted on the benchmark machine at N = 10, 30, 60 with 20 frontier points
    (685, 1,208, 4,452 and 13,645 us measured at N = 5, 10, 30, 60). Rough, like the rest of
    the model: it only sizes blocks."""
    n = spec.n_assets
    return 450.0 + 47.0 * n + 2.9 * n * n


def block_seconds(spec: "ResampleSpec", block: "Block") -> float:
    """Modelled seconds of one block on one core: its draws at :func:`_draw_micros` (at the
    block's history length), plus :func:`_frontier_micros` for each of its draws that
    traces frontiers. As rough as the model; batch runners use it to group cheap blocks
    into one task. It never changes a number."""
    micros = (block.stop - block.start) * _draw_micros(spec, block.length)
    if block.part == "main" and _frontier_rule_index(spec) is not None:
        traced = max(0, min(block.stop, spec.frontier_draws) - block.start)
        micros += traced * _frontier_micros(spec)
    return micros / 1e6


def _jsonable(obj):
    t = type(obj)     # exact types first: a summary holds thousands of plain values
    if t is float:
        return obj if math.isfinite(obj) else None
    if t is int or t is str or t is bool or obj is None:
        return obj
    if t is dict:
        return {str(k): _jsonable(v) for k, v in obj.items()}
    if t is list:
        return [_jsonable(v) for v in obj]
    if isinstance(obj, Mapping):
        return {str(k): _jsonable(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_jsonable(v) for v in obj]
    if isinstance(obj, np.ndarray):
        return _jsonable(obj.tolist())
    if isinstance(obj, (np.floating, np.integer)):
        return obj.item()
    if isinstance(obj, float) and not math.isfinite(obj):
        return None
    return obj


# --------------------------------------------------------------------------- validation

def _spec_iv(spec: ResampleSpec) -> None:
    """Validate a spec once (at the public entry points)."""
    mu = np.asarray(spec.population_mean)
    cov = np.asarray(spec.population_cov)
    n = mu.shape[0] if mu.ndim == 1 else -1
    if mu.ndim != 1 or cov.shape != (n, n):
        raise SettingsError(f"population mean must be (N,) and covariance (N, N); got "
                            f"{mu.shape} and {cov.shape}")
    if not (np.all(np.isfinite(mu)) and np.all(np.isfinite(cov))):
        raise DataError("the population mean or covariance holds NaN or infinite values")
    if len(spec.assets) != n:
        raise SettingsError(f"{len(spec.assets)} asset names for {n} assets")
    if spec.generator not in GENERATORS:
        raise SettingsError(f"[resample] generator = {spec.generator!r} is not one of: "
                            f"{', '.join(GENERATORS)}")
    if spec.generator in ("bootstrap", "block-bootstrap") and spec.history is None:
        raise SettingsError(f"[resample] generator '{spec.generator}' resamples a history; "
                            f"capital-market assumptions have none (use 'normal' or 'student-t')")
    if spec.draw not in ("auto", "histories", "moments"):
        raise SettingsError(f"[resample] draw = {spec.draw!r} is not one of: auto, histories, "
                            f"moments")
    if spec.draws < 1 or spec.length < 2:
        raise SettingsError(f"[resample] needs draws >= 1 and length >= 2 (got {spec.draws}, "
                            f"{spec.length})")
    if not (spec.risk_aversion > 0 and math.isfinite(spec.risk_aversion)):
        raise SettingsError(f"risk_aversion must be a positive number, not {spec.risk_aversion!r}")
    names = spec.rule_names
    if len(set(names)) != len(names):
        raise SettingsError(f"rule names must be unique, got {names}")
    if "equal-weight" not in names:
        raise SettingsError("the rules must include 1/N under the name 'equal-weight'")
    if spec.history is not None:
        h = np.asarray(spec.history)
        if h.ndim != 2 or h.shape[1] != n or not np.all(np.isfinite(h)):
            raise DataError(f"the history must be a finite (T, {n}) array")
    if spec.policy is not None and spec.policy not in names:
        raise SettingsError(f"policy {spec.policy!r} names no rule")
    if spec.frontier_rule is not None and spec.frontier_rule not in names:
        raise SettingsError(f"frontier rule {spec.frontier_rule!r} names no rule")
    draw_path(spec, spec.length)          # raises when draw = "moments" cannot be honoured
    for r in spec.rules:
        need = _min_rows(r, n)
        if need > spec.length:
            raise SettingsError(
                f"[resample] length = {spec.length} rows is too short for rule '{r.name}' "
                f"(estimators {r.mean} / {r.covariance} need at least {need} rows for "
                f"{n} assets)")


def _uses_inputs(rs: RuleSpec) -> bool:
    return bool(getattr(rs.rule, "needs_mean", True) or getattr(rs.rule, "needs_covariance", True))


def draw_path(spec: ResampleSpec, length: int, *, strict: bool = True):
    """How synthetic samples of ``length`` rows are drawn: ``("moments" | "histories", why)``.

    The moments path (draw the sample mean and the Wishart scatter matrix directly) applies
    when the generator is normal, every rule that uses inputs has estimators that are
    functions of the sample mean and covariance alone (a mean in :data:`MOMENTS_MEANS`
    with a covariance in :data:`MOMENTS_COVARIANCES`), and ``T - 1 >= N``. ``draw = "auto"`` takes it exactly then; ``"histories"`` never;
    ``"moments"`` requires it and raises SettingsError naming what prevents it (with
    ``strict=False``, e.g. for a sweep length, a singular scatter falls back to histories).
    """
    if spec.draw == "histories":
        return "histories", "draw = 'histories'"
    reasons = []
    if spec.generator != "normal":
        reasons.append(f"the '{spec.generator}' generator has no moments shortcut (only "
                       f"'normal' has)")
    needing = {}
    for rs in spec.rules:
        if not _uses_inputs(rs):
            continue
        if rs.mean not in MOMENTS_MEANS or rs.covariance not in MOMENTS_COVARIANCES:
            needing.setdefault((rs.mean, rs.covariance), []).append(rs.name)
    for (mean, cov), names in needing.items():
        who = f"rule '{names[0]}'" if len(names) == 1 else \
            "rules " + ", ".join(f"'{x}'" for x in names)
        reasons.append(f"{who} use{'s' if len(names) == 1 else ''} the estimators '{mean}' / "
                       f"'{cov}', which need the observations themselves")
    singular = length - 1 < spec.n_assets
    if singular:
        reasons.append(f"T - 1 = {length - 1} is below N = {spec.n_assets} (the scatter "
                       f"matrix would be singular)")
    if not reasons:
        return "moments", ("every estimator is a function of the sample mean and covariance "
                           "of normal draws")
    if spec.draw == "moments" and (strict or not (singular and len(reasons) == 1)):
        raise SettingsError("[resample] draw = 'moments' is not possible: " + "; ".join(reasons))
    return "histories", "; ".join(reasons)


def _min_rows(rs: RuleSpec, n: int) -> int:
    if not (getattr(rs.rule, "needs_mean", True) or getattr(rs.rule, "needs_covariance", True)):
        return 1
    try:
        from estimators import min_rows
    except ImportError:  # pragma: no cover - estimators not installed yet
        return 2
    return int(min_rows(rs.mean, rs.covariance, n))


# --------------------------------------------------------------------------- blocks

@dataclass(frozen=True)
class Block:
    """A unit of work: draws ``[start, stop)`` of one part of the study.

    Attributes
    ----------
    index : int
        Position in :func:`block_plan` (the merge order).
    start, stop : int
        Draw range within the part; ``start`` is a multiple of the chunk size.
    part : str
        ``main``, ``check`` or ``sweep``.
    length : int
        Rows per synthetic history.
    sweep_index : int
        Which sweep length (``part == "sweep"``), else -1.
    """

    index: int
    start: int
    stop: int
    part: str = "main"
    length: int = 0
    sweep_index: int = -1

    @property
    def first_chunk(self) -> int:
        return self.start // CHUNK_DRAWS

    @property
    def n_chunks(self) -> int:
        return int(math.ceil((self.stop - self.start) / CHUNK_DRAWS))

    @property
    def spawn_part(self) -> int:
        if self.part == "main":
            return _PART_MAIN
        if self.part == "check":
            return _PART_CHECK
        return _PART_SWEEP0 + self.sweep_index


def _self_check_applies(spec: ResampleSpec):
    """(True, "") when the Kan & Zhou closed form covers the setting, else (False, reason)."""
    n, t = spec.n_assets, spec.length
    if spec.self_check_draws <= 0:
        return False, "self_check_draws = 0"
    # the check always draws normal histories from the population moments: for a study
    # whose generator is not normal it is a run of the check on the study's own moments
    if t <= n + 4:
        return False, f"the closed form needs T > N + 4 (T = {t}, N = {n})"
    return True, ""


def block_plan(spec: ResampleSpec) -> list:
    """The study's blocks, in merge order; fixed by the spec (not by the workers).

    Main blocks first, then the sweep lengths in order, then the self-check. Blocks hold
    ``spec.block_draws`` draws; with the automatic size (``block_size = 0``) the main draws
    that trace frontiers (the first ``frontier_draws``), when they hold more than a block's
    modelled work, get smaller blocks of their own (:func:`_frontier_micros`), and the last
    blocks of a part that needs more than one block halve what is left (in whole chunks),
    so that the last blocks are short and the workers finish together.
    """
    size = spec.block_draws
    taper = spec.block_size <= 0
    blocks = []
    # automatic blocks: the draws that also trace frontiers (the first frontier_draws)
    # cost tens of times an ordinary draw, so when they hold more than a block's work they
    # get smaller blocks of their own, or one worker would be left with them at the end
    fine_until, fine = 0, size
    if taper and _frontier_rule_index(spec) is not None and spec.frontier_draws > 0:
        region = min(spec.draws, math.ceil(spec.frontier_draws / CHUNK_DRAWS) * CHUNK_DRAWS)
        micros = _draw_micros(spec) + _frontier_micros(spec)
        if region * micros > BLOCK_SECONDS * 1e6:
            fine_until = region
            fine = max(1, int(BLOCK_SECONDS * 1e6 / micros) // CHUNK_DRAWS) * CHUNK_DRAWS

    def add(part, total, length, k=-1, fine_until=0):
        start = 0
        while start < total:
            rest = total - start
            step = size
            if start < fine_until:
                step = min(fine, fine_until - start)
            elif taper and total > size and rest < 2 * size:
                # automatic blocks shrink towards the end of each part (half of what is
                # left, in whole chunks), so that workers finish together
                step = max(CHUNK_DRAWS, math.ceil(rest / 2 / CHUNK_DRAWS) * CHUNK_DRAWS)
            stop = min(start + step, total)
            blocks.append(Block(len(blocks), start, stop, part, length, k))
            start = stop

    add("main", spec.draws, spec.length, fine_until=fine_until)
    for k, t in enumerate(spec.sweep_lengths):
        add("sweep", spec.n_sweep_draws, int(t), k)
    if _self_check_applies(spec)[0]:
        add("check", spec.self_check_draws, spec.length)
    return blocks


@dataclass(frozen=True)
class BlockResult:
    """What one block contributes: per-chunk partial sums, counts, samples, kept draws.

    Attributes
    ----------
    index : int
        The block's position in the plan.
    part : str
    first_chunk, n_chunks, n_draws : int
    fingerprint : str
        The spec's fingerprint (a block from another spec is never merged).
    sums : dict of str to ndarray, shape (n_chunks, ...)
        Floating-point partial sums, one row per chunk (merged in chunk order).
    counts : dict of str to ndarray (int64)
        Order-free integer counts.
    extrema : dict of str to ndarray
        ``min:<name>`` / ``max:<name>`` running extrema.
    samples : dict of str to ndarray, shape (draws kept, ...)
        Per-draw values kept for distribution tables and per-draw weights.
    """

    index: int
    part: str
    first_chunk: int
    n_chunks: int
    n_draws: int
    fingerprint: str
    sums: dict
    counts: dict
    extrema: dict
    samples: dict
    notes: dict = field(default_factory=dict)

    _MAGIC = b"NPBLOCK1\n"

    def __reduce__(self):
        # Between processes (the local executor's pipes), the counts travel sparse: the
        # weight histograms are (N, bins) arrays with a few occupied bins per asset (3.2 MB
        # per rule at N = 200, some 0.1 MB sparse), and pickling, piping and unpickling
        # them densely cost the parent and the workers a few percent of a two-core run.
        counts = {k: _sparse_counts(v) for k, v in self.counts.items()}
        return (_block_from_parts, (self.index, self.part, self.first_chunk, self.n_chunks,
                                    self.n_draws, self.fingerprint, self.sums, counts,
                                    self.extrema, self.samples, self.notes))

    def to_bytes(self) -> bytes:
        """Durable form: a header with a SHA-256 checksum, then an ``.npz`` payload."""
        arrays = {}
        for group in ("sums", "counts", "extrema", "samples"):
            for k, v in getattr(self, group).items():
                arrays[f"{group}/{k}"] = v
        meta = {"index": self.index, "part": self.part, "first_chunk": self.first_chunk,
                "n_chunks": self.n_chunks, "n_draws": self.n_draws,
                "fingerprint": self.fingerprint, "notes": self.notes}
        arrays["meta"] = np.frombuffer(json.dumps(meta).encode(), dtype=np.uint8)
        buf = io.BytesIO()
        np.savez_compressed(buf, **arrays)
        payload = buf.getvalue()
        digest = hashlib.sha256(payload).hexdigest().encode()
        return self._MAGIC + digest + b" " + str(len(payload)).encode() + b"\n" + payload

    @classmethod
    def from_bytes(cls, data: bytes) -> "BlockResult":
        """Read :meth:`to_bytes` output; a truncated or altered file raises DataError."""
        if not data.startswith(cls._MAGIC):
            raise DataError("block file is not a noiseproof block (bad header)")
        rest = data[len(cls._MAGIC):]
        nl = rest.find(b"\n")
        if nl < 0:
            raise DataError("block file is truncated (no header)")
        try:
            digest, size = rest[:nl].split(b" ")
            size = int(size)
        except ValueError:
            raise DataError("block file header is corrupt") from None
        payload = rest[nl + 1:]
        if len(payload) != size:
            raise DataError(f"block file is truncated ({len(payload)} of {size} payload bytes)")
        if hashlib.sha256(payload).hexdigest().encode() != digest:
            raise DataError("block file is corrupt (checksum mismatch)")
        with np.load(io.BytesIO(payload), allow_pickle=False) as z:
            meta = json.loads(bytes(z["meta"]).decode())
            groups = {"sums": {}, "counts": {}, "extrema": {}, "samples": {}}
            for key in z.files:
                if key == "meta":
                    continue
                g, name = key.split("/", 1)
                groups[g][name] = z[key]
        return cls(meta["index"], meta["part"], meta["first_chunk"], meta["n_chunks"],
                   meta["n_draws"], meta["fingerprint"], **groups,
                   notes=meta.get("notes", {}))


def _sparse_counts(v: np.ndarray):
    """``v`` as ``(shape, dtype, flat indices, values)`` when that is smaller, else ``v``."""
    if v.size < 4096:
        return v
    idx = np.flatnonzero(v)
    if 3 * idx.size > v.size:
        return v
    return (v.shape, v.dtype.str, idx.astype(np.int32 if v.size < 2 ** 31 else np.int64),
            v.ravel()[idx])


def _dense_counts(v) -> np.ndarray:
    if isinstance(v, np.ndarray):
        return v
    shape, dtype, idx, values = v
    out = np.zeros(shape, dtype=np.dtype(dtype))
    out.ravel()[idx] = values
    return out


def _block_from_parts(index, part, first_chunk, n_chunks, n_draws, fingerprint, sums,
                      counts, extrema, samples, notes) -> BlockResult:
    """Unpickle a :class:`BlockResult` (see ``BlockResult.__reduce__``)."""
    return BlockResult(index, part, first_chunk, n_chunks, n_draws, fingerprint, sums,
                       {k: _dense_counts(v) for k, v in counts.items()}, extrema, samples,
                       notes)


# --------------------------------------------------------------------------- scoring

def score(weights: np.ndarray, mean: np.ndarray, cov: np.ndarray, gamma: float) -> np.ndarray:
    """Population metrics of allocations.

    Parameters
    ----------
    weights : ndarray, shape (D, N)
        Risky-asset weights; any remainder ``1 - sum(w)`` is cash, which earns the
        risk-free rate (zero in excess-return terms). A NaN row (a draw the rule could
        not handle) gives NaN metrics.
    mean : ndarray, shape (N,)
        Population (excess) mean per period.
    cov : ndarray, shape (N, N)
        Population covariance per period.
    gamma : float
        Risk aversion.

    Returns
    -------
    ndarray, shape (D, 5)
        Columns :data:`METRICS`: expected return ``w'mu``, variance ``w' Sigma w``,
        volatility, Sharpe ratio ``w'mu / vol`` (0 for a portfolio without risk), and
        CEQ ``w'mu - gamma / 2 w' Sigma w`` (all per period).
    """
    er = weights @ mean
    var = np.einsum("dn,dn->d", weights @ cov, weights)
    # the element-wise rest in one kernel (same operations as the numpy form
    # maximum(var, 0), sqrt, where(vol > 0, er / vol, nan-or-0), er - 0.5 gamma var)
    out = np.empty((weights.shape[0], 5))
    return _kernels.score_columns(np.ascontiguousarray(er, dtype=np.float64),
                                  np.ascontiguousarray(var, dtype=np.float64),
                                  0.5 * gamma, out)


# --------------------------------------------------------------------------- per-process context

class _Context:
    """Objects derived from a spec (generators, histogram layouts); rebuilt per call."""

    def __init__(self, spec: ResampleSpec):
        self.spec = spec
        self.mu = np.ascontiguousarray(spec.population_mean, dtype=np.float64)
        self.cov = np.ascontiguousarray(spec.population_cov, dtype=np.float64)
        self.gamma = float(spec.risk_aversion)
        self.n = self.mu.shape[0]
        self.rules = spec.rules
        self.ew = spec.rule_names.index("equal-weight")
        self.pol = None if spec.policy is None else spec.rule_names.index(spec.policy)
        self._gen = None
        self._check_gen = None
        self.hists = [_histogram_for(r) for r in spec.rules]
        self.attrib = [bool(spec.attribution and getattr(r.rule, "needs_mean", False)
                            and getattr(r.rule, "needs_covariance", False)) for r in spec.rules]
        self.frontier_index = _frontier_rule_index(spec)

    @property
    def generator(self):
        if self._gen is None:
            s = self.spec
            self._gen = make_generator(s.generator, mean=self.mu, cov=self.cov,
                                       history=None if s.history is None
                                       else np.ascontiguousarray(s.history, dtype=np.float64),
                                       degrees_of_freedom=s.degrees_of_freedom,
                                       block_length=s.block_length)
            if s.degrees_of_freedom_fitted and hasattr(self._gen, "fitted"):
                self._gen = replace(self._gen, fitted=True)
            if s.block_length_automatic and hasattr(self._gen, "automatic"):
                self._gen = replace(self._gen, automatic=True)
        return self._gen

    @property
    def check_generator(self):
        if self._check_gen is None:
            self._check_gen = NormalGenerator(self.mu, self.cov)
        return self._check_gen

    @property
    def frontier_constraints(self):
        """(constraints, description) for the frontiers; resolved once per context.

        The frontier rule's own constraints when the critical line algorithm supports
        them (full budget, no groups, bounded weights); else long-only with the rule's
        per-asset bounds; else plain long-only.
        """
        cached = getattr(self, "_frontier_cons", None)
        if cached is not None:
            return cached
        from optimise import efficient_frontier, make_constraints

        rule = self.rules[self.frontier_index].rule
        bounds = (getattr(rule, "params", {}) or {}).get("bounds")
        candidates = [(lambda: rule.constraints, "the rule's own constraints")]
        if bounds:
            candidates.append((lambda: make_constraints(self.spec.assets, long_only=True,
                                                        bounds=bounds),
                               "long-only, full budget, with the rule's per-asset bounds (the "
                               "critical line algorithm takes no group bounds or cash budget)"))
        candidates.append((lambda: make_constraints(self.spec.assets, long_only=True),
                           "long-only, full budget (the critical line algorithm takes no group "
                           "bounds, cash budget or unbounded weights)"))
        last = None
        for make, text in candidates:
            try:
                cons = make()
                efficient_frontier(self.mu, self.cov, cons)
            except NoiseproofError as exc:
                last = exc
                continue
            self._frontier_cons = (cons, text)
            return self._frontier_cons
        raise last

    def path(self, block) -> str:
        """Draw path of a block: the main part's for main and check, per length for sweeps."""
        if block.part == "check":
            # the self-check's plug-in rule uses the sample mean and divisor-T covariance of
            # normal draws: the moments path applies whenever the main part takes it
            return draw_path(self.spec, self.spec.length)[0]
        return draw_path(self.spec, block.length, strict=block.part == "main")[0]

    def fixed_weights(self, i: int) -> np.ndarray:
        """Weights of an input-free rule (e.g. 1/N), from one call with the population."""
        cache = self.__dict__.setdefault("_fixed", {})
        if i not in cache:
            a = self.rules[i].rule.weights(self.mu, self.cov)
            cache[i] = np.asarray(getattr(a, "weights", a), dtype=np.float64)
        return cache[i]

    def sweep_valid(self, length: int):
        return [_min_rows(r, self.n) <= length for r in self.rules]


def _histogram_for(rs: RuleSpec) -> WeightHistogram:
    params = getattr(rs.rule, "params", {}) or {}
    long_only = bool(params.get("long_only", True))
    budget = params.get("budget", "full")
    if rs.rule.type == "equal-weight" or (long_only and budget == "full"):
        return WeightHistogram(0.0, 1.0, WEIGHT_BIN)
    return WeightHistogram(-3.0, 3.0, WEIGHT_BIN)


def _frontier_rule_index(spec: ResampleSpec) -> Optional[int]:
    if spec.frontier_points < 2:
        return None
    for i, r in enumerate(spec.rules):
        if spec.frontier_rule is not None:
            if r.name == spec.frontier_rule:
                return i
        elif getattr(r.rule, "needs_mean", False) and getattr(r.rule, "needs_covariance", False):
            return i
    return None


# --------------------------------------------------------------------------- estimation hooks

def _estimate_batch(histories: np.ndarray, rs: RuleSpec):
    from estimators import estimate_batch

    params = dict(rs.params)
    given_mean = params.pop("given_mean", None)
    given_cov = params.pop("given_covariance", None)
    mb = estimate_batch(histories, rs.mean, rs.covariance, params=params or None,
                        given_mean=given_mean, given_covariance=given_cov)
    return np.asarray(mb.mean, dtype=np.float64), np.asarray(mb.covariance, dtype=np.float64)


#: Estimators that are functions of the sample mean and scatter matrix alone, so that the
#: moments path can feed them (the covariances divide the scatter by T-1 or T; the
#: Bayes-Stein and James-Stein means use the sample mean, the scatter and its diagonal).
MOMENTS_MEANS = ("sample", "bayes-stein", "james-stein")
MOMENTS_COVARIANCES = ("sample", "sample-mle")


class _MomentsChunk:
    """The estimators' chunk interface (``estimators._chunk.Chunk``) over drawn moments.

    Offers what the moments-only estimators read: ``B``, ``T``, ``N``, ``mean``,
    ``scatter``, ``variances(ddof)`` and ``scaled_scatter(factor, out)``; the demeaned
    observations (``Y``) do not exist on this path. A test checks that every estimator in
    :data:`MOMENTS_MEANS` / :data:`MOMENTS_COVARIANCES` gives the same numbers here as
    ``estimators.estimate_batch`` on histories with the same sample moments.
    """

    def __init__(self, sm):
        self.B, self.T, self.N = sm.shape
        self.mean = sm.mean
        self.scatter = sm.scatter

    def variances(self, ddof):
        return np.diagonal(self.scatter, axis1=1, axis2=2) / (self.T - ddof)

    def scaled_scatter(self, factor, out):
        np.multiply(self.scatter, factor, out=out)
        return out


def _from_sample_moments(sm, rs: RuleSpec):
    """Estimates from drawn sample moments (moments path), through the estimators' own code."""
    from estimators.registry import lookup
    from estimators._chunk import WindowProblem
    from estimators.core import SingularCovarianceError

    chunk = _MomentsChunk(sm)
    params = {k: v for k, v in rs.params.items() if k not in ("given_mean", "given_covariance")}
    covs = np.empty_like(sm.scatter)
    try:
        means, _ = lookup(rs.mean, "mean").compute(chunk, params)
        lookup(rs.covariance, "covariance").compute(chunk, params, covs)
    except WindowProblem as p:
        err = SingularCovarianceError if p.singular else DataError
        raise err(f"draw {p.window} of the chunk: {p.message}") from None
    return np.asarray(means, dtype=np.float64), covs


def _moments_for(ctx: _Context, histories, valid=None):
    """Estimated moments per estimator key for the rules that need them (one chunk).

    ``histories`` is a (d, T, N) array (history path) or a SampleMoments (moments path).
    """
    cache = {}
    out = []
    estimate = _from_sample_moments if isinstance(histories, SampleMoments) else _estimate_batch
    for i, rs in enumerate(ctx.rules):
        if valid is not None and not valid[i]:
            out.append(None)
            continue
        if not (getattr(rs.rule, "needs_mean", True) or getattr(rs.rule, "needs_covariance", True)):
            out.append(None)          # input-free rule (1/N): weights computed once
            continue
        key = rs.estimator_key()
        if key not in cache:
            cache[key] = estimate(histories, rs)
        out.append(cache[key])
    return out


def _rule_weights(ctx, i, moments_i, d):
    """_weights for rule i of the context; input-free rules are solved once and repeated."""
    rs = ctx.rules[i]
    if moments_i is None:
        fixed = ctx.fixed_weights(i)
        return np.repeat(fixed[None, :], d, axis=0), np.ones(d, dtype=bool), None
    return _weights(rs, *moments_i)


def _weights(rs: RuleSpec, means, covs):
    """Weights of one chunk, shape (d, N), with NaN rows where the rule has no answer.

    The batched call is tried first; when it raises (e.g. no portfolio with a positive
    expected return for max-sharpe in some draw), the chunk is solved draw by draw and
    the draws the rule cannot handle get NaN weights. Returns ``(weights, ok, message)``
    with ``ok`` (d,) bool and the first failure's message (or None).
    """
    means = np.ascontiguousarray(means)
    covs = np.ascontiguousarray(covs)
    try:
        # independent draws: the previous draw's solution is no better a start than the
        # cold one, so the solver does not test it
        w = np.asarray(rs.rule.weights_batch(means, covs, warm=False), dtype=np.float64)
        ok = np.all(np.isfinite(w), axis=1)
        msg = None if ok.all() else f"rule '{rs.name}' returned non-finite weights"
        if not ok.all():
            w = w.copy()
            w[~ok] = np.nan
        return w, ok, msg
    except NoiseproofError:
        pass
    d, n = means.shape
    w = np.full((d, n), np.nan)
    ok = np.zeros(d, dtype=bool)
    msg = None
    for j in range(d):
        try:
            a = rs.rule.weights(means[j], covs[j])
        except NoiseproofError as exc:
            msg = msg or " ".join(str(exc).split())
            continue
        x = np.asarray(getattr(a, "weights", a), dtype=np.float64)
        if np.all(np.isfinite(x)):
            w[j] = x
            ok[j] = True
    return w, ok, msg


# --------------------------------------------------------------------------- block work

def chunk_generator(seed: int, part: int, chunk: int) -> np.random.Generator:
    """The random generator of one chunk: child ``chunk`` of child ``part`` of the root.

    ``SeedSequence(seed, spawn_key=(part, chunk))`` is exactly
    ``SeedSequence(seed).spawn(part + 1)[part].spawn(chunk + 1)[chunk]``. The bit generator is
    numpy's SFC64 (Small Fast Chaotic, 64-bit): about 1.4 times PCG64's rate of normal
    variates on the benchmark machine, with the same SeedSequence seeding.
    """
    ss = np.random.SeedSequence(seed, spawn_key=(part, chunk))
    return np.random.Generator(np.random.SFC64(ss))


def run_block(spec: ResampleSpec, block_index: int) -> BlockResult:
    """Compute one block of the plan. Pure: same spec and index, same bytes.

    Parameters
    ----------
    spec : ResampleSpec
    block_index : int
        Index into :func:`block_plan`.

    Returns
    -------
    BlockResult
        Picklable; :meth:`BlockResult.to_bytes` gives its durable form.
    """
    spec = spec.resolved()          # no-op for a resolved spec (prepare_study's are)
    # BLAS splits a matrix product differently with different thread counts, which changes
    # the last bits of the results: every block is computed with one BLAS thread, in this
    # process or in a worker, so that the numbers cannot depend on where it ran
    with _one_blas_thread():
        return _run_block(spec, block_index)


def _blas_controller():
    """threadpoolctl's controller of this process's thread pools (built once, after
    scipy's BLAS is loaded: numpy and scipy bring an OpenBLAS each, and the engine calls
    both)."""
    global _BLAS_CONTROLLER
    if _BLAS_CONTROLLER is None:
        import scipy.linalg.blas  # noqa: F401  (its library must be in the controller)
        from threadpoolctl import ThreadpoolController

        _BLAS_CONTROLLER = ThreadpoolController()
    return _BLAS_CONTROLLER


def _blas_is_single_threaded() -> bool:
    """Whether every BLAS library of this process already runs one thread."""
    return all(c.num_threads == 1 for c in _blas_controller().lib_controllers
               if c.user_api == "blas")


def _one_blas_thread():
    """Context manager: BLAS limited to one thread.

    A no-op when BLAS already runs one thread. Setting the limit anyway is not free: in a
    process forked from one that used OpenBLAS (the fork stops OpenBLAS's helper threads),
    setting the thread count restarts the helpers, which then busy-wait for about 0.1 s
    before they sleep. Measured on the benchmark machine: a worker's first block took
    95-140 ms instead of 25-35 ms, on both processes, because of those spinning threads.
    """
    if _blas_is_single_threaded():
        return contextlib.nullcontext()
    return _blas_controller().limit(limits=1, user_api="blas")


def pin_one_blas_thread() -> None:
    """Limit BLAS to one thread for the rest of this process (worker processes: the
    workers are the parallelism); nothing to do, and nothing done, when it already runs
    one (see :func:`_one_blas_thread`)."""
    if not _blas_is_single_threaded():
        from threadpoolctl import threadpool_limits

        threadpool_limits(1, user_api="blas")


#: threadpoolctl's view of this process's thread pools (built on first use).
_BLAS_CONTROLLER = None


def retain_freed_memory() -> bool:
    """Ask the C allocator to keep freed memory for reuse in this process (glibc only).

    By default glibc returns every freed block above 128 KiB to the operating system and
    maps fresh memory on the next request, so each chunk's working arrays come back as new
    pages that the kernel must fault in and zero (on the benchmark machine, about a fifth
    of the engine's time at N = 10 to 200). Raising the mmap threshold to 32 MiB and the
    trim threshold to 1 GiB lets the arrays of one chunk reuse the memory of the last. The
    process then keeps up to its peak heap (tens of MiB for a study). Applied once per
    process, by :func:`run_resampling` and by the local worker processes. The workers of a
    Dask cluster the batch starts itself get the same settings as environment variables
    (:data:`MALLOC_SETTINGS`); the workers of a cluster it is given keep the cluster's own.
    Numbers are unaffected. Returns whether the settings were applied (False off glibc).
    """
    global _RETAINED
    if _RETAINED is None:
        _RETAINED = False
        if sys.platform.startswith("linux"):
            try:
                import ctypes

                mallopt = ctypes.CDLL(None).mallopt
                mallopt.argtypes = (ctypes.c_int, ctypes.c_int)
                # M_MMAP_THRESHOLD (-3): 32 MiB, glibc's largest; M_TRIM_THRESHOLD (-1): 1 GiB
                _RETAINED = (bool(mallopt(-3, MALLOC_SETTINGS["MALLOC_MMAP_THRESHOLD_"]))
                             and bool(mallopt(-1, MALLOC_SETTINGS["MALLOC_TRIM_THRESHOLD_"])))
            except (OSError, AttributeError):
                _RETAINED = False
    return _RETAINED


#: The settings of :func:`retain_freed_memory`, by the names of the environment variables
#: through which glibc takes them at a process's start (a local Dask cluster's workers get
#: them that way): mmap threshold 32 MiB (glibc's largest), trim threshold 1 GiB.
MALLOC_SETTINGS = {"MALLOC_MMAP_THRESHOLD_": 32 << 20, "MALLOC_TRIM_THRESHOLD_": 1 << 30}

#: Whether :func:`retain_freed_memory` applied its settings in this process (None: not asked).
_RETAINED = None


def _run_block(spec: ResampleSpec, block_index: int) -> BlockResult:
    plan, ctx, fingerprint = _derived(spec)
    if not 0 <= block_index < len(plan):
        raise SettingsError(f"block index {block_index} out of range (0..{len(plan) - 1})")
    block = plan[block_index]
    if block.part == "main":
        acc = _MainAccumulator(ctx, block)
    elif block.part == "sweep":
        acc = _SweepAccumulator(ctx, block)
    else:
        acc = _CheckAccumulator(ctx, block)
    gen = ctx.check_generator if block.part == "check" else ctx.generator
    path = ctx.path(block)
    draw = gen.draw_moments if path == "moments" else gen.draw
    tile = tile_draws(ctx.spec, block.length, path, block.part)
    for c in range(block.first_chunk, block.first_chunk + block.n_chunks):
        lo = c * CHUNK_DRAWS
        hi = min(lo + CHUNK_DRAWS, block.stop)
        rng = chunk_generator(spec.seed, block.spawn_part, c)
        try:
            acc.add_chunk(_tiles(draw, rng, hi - lo, block.length, tile), hi - lo, lo)
        except NoiseproofError as exc:
            raise type(exc)(f"resampling ({block.part} draws {lo}..{hi - 1}): {exc}") from None
    return acc.result(fingerprint)


#: Bytes of per-draw working arrays (histories, their centred copies, estimated
#: covariances) one tile may hold: at N = 200 a whole chunk's arrays (some 60 MB) would not
#: fit the cache the cores share (32 MB on the benchmark machine), a tile's do. Small
#: assets counts keep whole chunks (history path, T = 120, one estimator: N = 10: one tile of
#: 125 draws; N = 50: 26; N = 200: 3; the moments path holds no histories: N = 50: 125).
TILE_BYTES = 4 << 20


def tile_draws(spec: "ResampleSpec", length: int, path: str, part: str = "main") -> int:
    """Draws per tile: how many draws of a chunk are generated, estimated, optimised and
    scored together.

    A chunk (:data:`CHUNK_DRAWS` draws, the unit of randomness) is processed in tiles of
    this many draws, drawn one after the other from the chunk's generator. The number is a
    function of the spec alone (assets, rows, path, estimators), never of the block size
    or the workers, so results do not depend on those; it does fix where the random stream
    is cut (Student-t, moments path) and the shapes of the matrix products (their last
    bits), so changing it changes the numbers (as a different seed would).
    """
    n = spec.n_assets
    if part == "check":
        keys = 1
    else:
        keys = max(1, len({r.estimator_key() for r in spec.rules if _uses_inputs(r)}))
    if path == "moments":
        per_draw = 8 * keys * n * n                           # the drawn moments are small
    else:
        # the history and its centred copy; the covariances and scratch
        per_draw = 8 * (2 * length * n + (2 + keys) * n * n)
    return int(max(1, min(CHUNK_DRAWS, TILE_BYTES // per_draw)))


def _tiles(draw, rng, d, length, tile):
    """Yield ``(start, stop, histories)`` for the tiles of a chunk of ``d`` draws, drawing
    each tile from ``rng`` only when the previous one has been used."""
    for s in range(0, d, tile):
        e = min(d, s + tile)
        yield s, e, draw(rng, e - s, length)


#: (spec, ((plan, context, fingerprint), copies of its arrays)): the last spec run_block
#: saw in this process.
_LAST_SPEC = (None, None)


def _derived(spec: ResampleSpec):
    """The block plan, the context and the fingerprint of ``spec``, kept for the next call.

    All three are pure functions of the (frozen) spec, so the blocks a process runs for
    the same spec object share them instead of rebuilding them per block (about 0.5 ms a
    block: the plan, the SHA-256 fingerprint, the Cholesky factor of the generator).
    Keyed by identity: a new or rebuilt spec object gets fresh ones. The spec is frozen
    but its arrays are not, so their contents are compared as well (a few microseconds).
    """
    global _LAST_SPEC
    last, cached = _LAST_SPEC
    arrays = (spec.population_mean, spec.population_cov, spec.history)
    if last is spec and all(a is None and b is None or a is not None and b is not None
                            and np.array_equal(a, b) for a, b in zip(arrays, cached[1])):
        return cached[0]
    derived = (block_plan(spec), _Context(spec), spec.fingerprint())
    _LAST_SPEC = (spec, (derived, tuple(None if a is None else np.array(a, copy=True)
                                        for a in arrays)))
    return derived


class _Accumulator:
    def __init__(self, ctx, block):
        self.ctx = ctx
        self.block = block
        self.sums: dict = {}
        self.counts: dict = {}
        self.extrema: dict = {}
        self.samples: dict = {}
        self.notes: dict = {}
        self.n_draws = 0

    def _sum(self, name, values):
        self.sums.setdefault(name, []).append(np.asarray(values, dtype=np.float64).sum(axis=0))

    def _moments(self, name, values):
        """Chunk count, mean and squared deviations of ``values`` (NaN = no value)."""
        n, mean, m2 = chunk_moments(values)
        self.sums.setdefault(name + ":n", []).append(n)
        self.sums.setdefault(name + ":mean", []).append(mean)
        self.sums.setdefault(name + ":m2", []).append(m2)

    def _zero_moments(self, name, shape):
        """The chunk moments of values that are all NaN: n, mean and m2 all zero."""
        for suffix in (":n", ":mean", ":m2"):
            self.sums.setdefault(name + suffix, []).append(np.zeros(shape))

    def _count(self, name, values):
        v = np.asarray(values, dtype=np.int64)
        if name in self.counts:
            self.counts[name] += v
        else:
            self.counts[name] = v.copy()

    def _sample(self, name, values):
        self.samples.setdefault(name, []).append(np.asarray(values))

    def _note(self, rule_name, msg):
        if msg and rule_name not in self.notes:
            self.notes[rule_name] = msg

    def result(self, fingerprint) -> BlockResult:
        sums = {k: np.stack(v) for k, v in self.sums.items()}
        samples = {k: np.concatenate(v) for k, v in self.samples.items()}
        return BlockResult(self.block.index, self.block.part, self.block.first_chunk,
                           self.block.n_chunks, self.n_draws, "" if fingerprint is None
                           else fingerprint, sums, self.counts, self.extrema, samples,
                           dict(self.notes))


#: Relative margin below which a rule and 1/N tie (rounding of identical allocations).
TIE_RTOL = 1e-10


def _beats(metrics, ref):
    """(R, 2) counts of draws beating rule ``ref`` (1/N or the policy) on CEQ and on
    Sharpe (failed draws never do); one kernel pass, see :func:`_beats_numpy`.

    A draw beats 1/N when its figure is above 1/N's by more than ``TIE_RTOL`` relative to
    1/N's scale (``|ceq| + variance`` for CEQ, ``|sharpe|`` for Sharpe), so that the
    rounding of an allocation equal to 1/N never counts as beating it.
    """
    out = np.empty((metrics.shape[1], 2), dtype=np.int64)
    return _kernels.beats_counts(np.ascontiguousarray(metrics, dtype=np.float64), int(ref),
                                 TIE_RTOL, out)


def _beats_numpy(metrics, ew):
    """The numpy form of :func:`_beats` with the reference's metrics ``ew`` (D, 5)
    (a test compares the two)."""
    tol_ceq = TIE_RTOL * (np.abs(ew[:, None, 4]) + np.abs(ew[:, None, 1])) + 1e-300
    tol_sh = TIE_RTOL * np.abs(ew[:, None, 3]) + 1e-300
    with np.errstate(invalid="ignore"):
        return np.stack([(metrics[:, :, 4] > ew[:, None, 4] + tol_ceq).sum(axis=0),
                         (metrics[:, :, 3] > ew[:, None, 3] + tol_sh).sum(axis=0)], axis=1)


def _tracking_errors(weights, policy, cov):
    """(d, R) population tracking errors ``sqrt((w - p)' Sigma (w - p))`` of (d, R, N)
    weights against the (d, N) policy weights of the same draws (NaN where either failed)."""
    diff = weights - policy[:, None, :]
    v = np.einsum("drn,drn->dr", diff @ cov, diff)
    return np.sqrt(np.maximum(v, 0.0))


class _MainAccumulator(_Accumulator):
    def add_chunk(self, tiles, d, first_draw):
        """Fold one chunk of ``d`` draws, given as tiles ``(start, stop, histories)``."""
        ctx, spec = self.ctx, self.ctx.spec
        self.n_draws += d
        n_rules = len(ctx.rules)
        weights = np.empty((d, n_rules, ctx.n))
        metrics = np.empty((d, n_rules, 5))
        ok = np.empty((d, n_rules), dtype=bool)
        att_ok = np.zeros((d, n_rules, 2), dtype=bool)
        att = np.full((d, n_rules, 2, 5), np.nan) if any(ctx.attrib) else None
        front = self._frontier_arrays(d, first_draw)
        for s, e, histories in tiles:
            moments = _moments_for(ctx, histories)
            for i, rs in enumerate(ctx.rules):
                w, ok[s:e, i], msg = _rule_weights(ctx, i, moments[i], e - s)
                self._note(rs.name, msg)
                weights[s:e, i] = w
                metrics[s:e, i] = score(w, ctx.mu, ctx.cov, ctx.gamma)
            if att is not None:
                self._attribution(moments, s, e, att, att_ok)
            if front is not None:
                self._frontier_tile(moments, s, e, front)
        cash = 1.0 - weights.sum(axis=2)
        self._count("ok", ok.sum(axis=0))
        self._moments("w", weights)
        self._moments("cash", cash)
        self._moments("m", metrics)
        with np.errstate(invalid="ignore"):
            self._count("held", (np.abs(weights) > spec.hold_threshold).sum(axis=0))
        self._count("beats", _beats(metrics, ctx.ew))
        if ctx.pol is not None:
            self._count("beats_policy", _beats(metrics, ctx.pol))
            self._moments("te", _tracking_errors(weights, weights[:, ctx.pol], ctx.cov))
        for i, h in enumerate(ctx.hists):
            counts = self.counts.setdefault(f"hist{i}", np.zeros((ctx.n, h.n_columns), np.int64))
            _kernels.bin_counts(np.ascontiguousarray(weights[ok[:, i], i]), h.low, h.width,
                                h.n_bins, h.zero_tol, counts)
        wmin = np.where(ok[:, :, None], weights, np.inf).min(axis=0)
        wmax = np.where(ok[:, :, None], weights, -np.inf).max(axis=0)
        self.extrema["wmin"] = np.minimum(self.extrema.get("wmin", wmin), wmin)
        self.extrema["wmax"] = np.maximum(self.extrema.get("wmax", wmax), wmax)
        keep = max(0, min(d, spec.metric_sample - first_draw))
        if keep:
            self._sample("metrics", metrics[:keep])
        if spec.keep_draws:
            self._sample("weights", weights)
        # attribution: true mean + estimated covariance, estimated mean + true covariance
        self._count("att_ok", att_ok.sum(axis=0))
        if att is None:
            # no rule attributes: every value is NaN, whose chunk moments are (0, 0, 0)
            # (what chunk_moments returns for an all-NaN chunk), without the NaN pass
            self._zero_moments("att", (n_rules, 2, 5))
        else:
            self._moments("att", att)
        self._frontier_fold(front)

    def _attribution(self, moments, s, e, att, att_ok):
        """Attribution runs of draws ``s:e`` of the chunk into ``att`` and ``att_ok``."""
        ctx = self.ctx
        for i, rs in enumerate(ctx.rules):
            if not ctx.attrib[i]:
                continue
            m_est, s_est = moments[i]
            w_tm, att_ok[s:e, i, 0], _ = _weights(rs, np.broadcast_to(ctx.mu, m_est.shape), s_est)
            w_tc, att_ok[s:e, i, 1], _ = _weights(rs, m_est, np.broadcast_to(ctx.cov, s_est.shape))
            att[s:e, i, 0] = score(w_tm, ctx.mu, ctx.cov, ctx.gamma)
            att[s:e, i, 1] = score(w_tc, ctx.mu, ctx.cov, ctx.gamma)

    def _frontier_arrays(self, d, first_draw):
        """Per-chunk frontier work arrays, or None when the chunk draws no frontiers.

        Frontiers (Broadie 1993) and the rank-matched averaged frontier (Michaud 1998) are
        drawn for the first ``frontier_draws`` draws of the study only.
        """
        ctx, spec = self.ctx, self.ctx.spec
        if ctx.frontier_index is None:
            return None
        k = spec.frontier_points
        nf = max(0, min(d, spec.frontier_draws - first_draw))
        return {"nf": nf, "k": k, "used": 0, "failed": 0, "viol": 0,
                "fr": np.full((d, k, 4), np.nan) if nf else None,   # est. mean, var; actual
                "fw": np.full((d, k, ctx.n), np.nan) if nf else None}

    def _frontier_tile(self, moments, s, e, front):
        """Frontiers of draws ``s:e`` of the chunk (those among the first ``nf``)."""
        ctx = self.ctx
        stop = min(e, front["nf"])
        if stop <= s:
            return
        from optimise import efficient_frontier

        cons = ctx.frontier_constraints[0]
        true = _true_frontier(ctx, cons)
        m_est, s_est = moments[ctx.frontier_index]
        fr, fw, k = front["fr"], front["fw"], front["k"]
        for j in range(s, stop):
            try:
                p = np.asarray(efficient_frontier(m_est[j - s], s_est[j - s], cons).points(k),
                               dtype=np.float64)
            except NoiseproofError as exc:
                front["failed"] += 1
                self._note("frontier", " ".join(str(exc).split()))
                continue
            fw[j] = p
            fr[j, :, 0] = p @ m_est[j - s]
            fr[j, :, 1] = np.einsum("kn,kn->k", p @ s_est[j - s], p)
            fr[j, :, 2] = p @ ctx.mu
            fr[j, :, 3] = np.einsum("kn,kn->k", p @ ctx.cov, p)
            front["used"] += 1
            front["viol"] += _broadie_violations(true, fr[j, :, 2], fr[j, :, 3])

    def _frontier_fold(self, front):
        if front is None:
            return
        if not front["nf"]:
            # past the frontier draws: all NaN, chunk moments (0, 0, 0)
            self._zero_moments("fr", (front["k"], 4))
            self._zero_moments("fw", (front["k"], self.ctx.n))
            self._count("frontier_draws", np.array([0, 0]))
            self._count("broadie_violations", np.array([0]))
            return
        self._moments("fr", front["fr"])
        self._moments("fw", front["fw"])
        self._count("frontier_draws", np.array([front["used"], front["failed"]]))
        self._count("broadie_violations", np.array([front["viol"]]))


def _true_frontier(ctx, cons):
    """(min-variance mean, max mean, min variance, frontier, cov) of the population."""
    cached = getattr(ctx, "_true_frontier", None)
    if cached is None:
        from optimise import efficient_frontier

        f = efficient_frontier(ctx.mu, ctx.cov, cons)
        pts = np.asarray(f.points(2), dtype=np.float64)
        cached = (float(pts[0] @ ctx.mu), float(pts[-1] @ ctx.mu),
                  float(pts[0] @ ctx.cov @ pts[0]), f, ctx.cov)
        ctx._true_frontier = cached
    return cached


def _broadie_violations(true, act_mean, act_var, rtol=1e-7) -> int:
    """Points of an actual frontier lying above the true frontier.

    Broadie (1993): the actual frontier (estimated-frontier portfolios judged under the
    population) can never lie above the true frontier, since its portfolios satisfy the
    same constraints and the true frontier is optimal. A point counts as a violation
    when its variance is below the true frontier's variance at its mean (relative
    tolerance ``rtol`` of the minimum variance, for the solvers' rounding).
    """
    lo, hi, gmv_var, f, cov = true
    scale = max(gmv_var, 1e-300)
    bad = int(np.sum(act_mean > hi + rtol * max(abs(hi), 1e-12)))
    inside = (act_mean >= lo) & (act_mean <= hi)
    if inside.any():
        w = np.asarray(f.at_returns(act_mean[inside]), dtype=np.float64)
        tvar = np.einsum("kn,kn->k", w @ cov, w)
        bad += int(np.sum(act_var[inside] < tvar - rtol * scale))
    below = act_mean < lo
    bad += int(np.sum(act_var[below] < gmv_var - rtol * scale))
    return bad


class _SweepAccumulator(_Accumulator):
    def add_chunk(self, tiles, d, first_draw):
        ctx = self.ctx
        self.n_draws += d
        valid = ctx.sweep_valid(self.block.length)
        n_rules = len(ctx.rules)
        metrics = np.full((d, n_rules, 5), np.nan)
        ok = np.zeros((d, n_rules), dtype=bool)
        for s, e, histories in tiles:
            moments = _moments_for(ctx, histories, valid)
            for i, rs in enumerate(ctx.rules):
                if valid[i]:
                    w, ok[s:e, i], msg = _rule_weights(ctx, i, moments[i], e - s)
                    self._note(rs.name, msg)
                    metrics[s:e, i] = score(w, ctx.mu, ctx.cov, ctx.gamma)
        self._count("ok", ok.sum(axis=0))
        self._moments("m", metrics)
        self._count("beats", _beats(metrics, ctx.ew))
        if ctx.pol is not None:
            self._count("beats_policy", _beats(metrics, ctx.pol))


class _CheckAccumulator(_Accumulator):
    """Plug-in cash-budget mean-variance rule w = S_mle^-1 m / gamma on normal histories."""

    def add_chunk(self, tiles, d, first_draw):
        ctx = self.ctx
        self.n_draws += d
        u = np.empty(d)
        for s, e, histories in tiles:
            t = histories.shape[1]
            if isinstance(histories, SampleMoments):
                m = histories.mean
                cov = histories.scatter / t
            else:
                m = histories.mean(axis=1)
                dev = histories - m[:, None, :]
                cov = np.matmul(dev.transpose(0, 2, 1), dev) / t
            w = np.linalg.solve(cov, m[:, :, None])[:, :, 0] / ctx.gamma
            u[s:e] = score(w, ctx.mu, ctx.cov, ctx.gamma)[:, 4]
        self._moments("u", u)


# --------------------------------------------------------------------------- merging

class _Merger:
    """Adds block results strictly in plan order; memory bounded by what it keeps."""

    def __init__(self, spec: ResampleSpec):
        self.spec = spec
        self.plan = block_plan(spec)
        self.fp = spec.fingerprint()
        self.next = 0
        self.parts: dict = {}

    def add(self, r: BlockResult) -> None:
        if r.index != self.next:
            raise SettingsError(f"block {r.index} given where block {self.next} was expected: "
                                f"merge blocks in plan order, each once")
        if r.fingerprint != self.fp:
            raise DataError(f"block {r.index} was computed for a different study (fingerprint "
                            f"mismatch); recompute it")
        b = self.plan[r.index]
        if r.part != b.part or r.first_chunk != b.first_chunk or r.n_draws != b.stop - b.start:
            raise DataError(f"block {r.index} does not match the plan (part, chunks or draws)")
        key = (b.part, b.sweep_index)
        p = self.parts.setdefault(key, {"sums": ChunkSums(), "counts": {}, "extrema": {},
                                        "samples": {}, "draws": 0, "notes": {}})
        for k, v in (r.notes or {}).items():
            p["notes"].setdefault(k, v)
        p["sums"].add(r.first_chunk, r.sums)
        for k, v in r.counts.items():
            p["counts"][k] = p["counts"][k] + v if k in p["counts"] else v.astype(np.int64)
        for k, v in r.extrema.items():
            op = np.minimum if k.startswith("wmin") else np.maximum
            p["extrema"][k] = op(p["extrema"][k], v) if k in p["extrema"] else v
        for k, v in r.samples.items():
            p["samples"].setdefault(k, []).append(v)
        p["draws"] += r.n_draws
        self.next += 1

    def finish(self) -> "ResampleResult":
        if self.next != len(self.plan):
            raise DataError(f"only {self.next} of {len(self.plan)} blocks were merged")
        return _finalize(self.spec, self.parts)


def merge_blocks(spec: ResampleSpec, results: Iterable[BlockResult]) -> "ResampleResult":
    """Merge block results (an iterable, in plan order) into the study's result.

    Memory stays bounded when ``results`` is a generator (e.g. reading block files one
    at a time): each block is folded into running totals and dropped.
    """
    _spec_iv(spec)
    spec = spec.resolved()
    m = _Merger(spec)
    for r in results:
        m.add(r)
    return m.finish()


#: The spec of this worker process (set once by :func:`_worker_init`).
_WORKER_SPEC = None


def _worker_init(spec=None):  # pragma: no cover - runs in worker processes
    """One BLAS thread per worker process (the workers are the parallelism); keep the
    study's spec, so that tasks carry only a block index and the blocks of one worker
    share its plan, context and fingerprint (see :func:`_derived`)."""
    global _WORKER_SPEC
    _WORKER_SPEC = spec
    retain_freed_memory()
    pin_one_blas_thread()      # inherited from the parent (see run_resampling): no-op


def _run_block_worker(index):  # pragma: no cover - runs in worker processes
    return run_block(_WORKER_SPEC, index)


def run_resampling(spec: ResampleSpec, *, workers: int = 1,
                   progress: Optional[Callable[[int], None]] = None) -> "ResampleResult":
    """Run every block of the plan and merge them.

    Parameters
    ----------
    spec : ResampleSpec
    workers : int, default 1
        Local worker processes; 1 runs in this process. The numbers do not depend on it.
    progress : callable, optional
        Called with the number of draws of each finished block (any part).

    Returns
    -------
    ResampleResult
    """
    _spec_iv(spec)
    spec = spec.resolved()
    plan = block_plan(spec)
    merger = _Merger(spec)
    retain_freed_memory()
    if workers <= 1 or len(plan) <= 1:
        for b in plan:
            merger.add(run_block(spec, b.index))
            if progress is not None:
                progress(b.stop - b.start)
        return merger.finish()
    import concurrent.futures as cf
    import multiprocessing as mp

    ctx = mp.get_context("fork") if "fork" in mp.get_all_start_methods() else None
    pending = {}
    done = {}
    nxt = 0
    window = 3 * workers
    manager = None
    try:
        # the workers are forked with BLAS at one thread already, so that they need not set
        # it (which would start OpenBLAS's spinning helper threads; see _one_blas_thread)
        with _one_blas_thread(), cf.ProcessPoolExecutor(max_workers=workers, mp_context=ctx,
                                                        initializer=_worker_init,
                                                        initargs=(spec,)) as pool:
            it = iter(plan)
            submitted = 0

            def submit(block):
                nonlocal submitted, manager
                pending[pool.submit(_run_block_worker, block.index)] = block
                submitted += 1
                if submitted == len(plan):
                    manager = _release_workers(pool)

            for b in it:
                submit(b)
                if len(pending) >= window:
                    break
            while pending:
                finished, _ = cf.wait(pending, return_when=cf.FIRST_COMPLETED)
                for fut in finished:
                    b = pending.pop(fut)
                    done[b.index] = fut.result()
                    if progress is not None:
                        progress(b.stop - b.start)
                    nb = next(it, None)
                    if nb is not None:
                        submit(nb)
                while nxt in done:
                    merger.add(done.pop(nxt))
                    nxt += 1
        result = merger.finish()
    finally:
        if manager is not None:
            manager.join()           # every worker has exited and been reaped
    return result


def _release_workers(pool):
    """Once the last block is submitted, shut the pool down without waiting: its manager
    thread then stops the workers as soon as the last result is in, and they exit (about
    10-30 ms at N = 200) while this process finalises, instead of before. Returns that
    thread, which joins the workers; the caller joins it before returning, so no worker
    outlives the call. None, and the pool is left to its ``with`` block, if the executor
    lacks the thread (an attribute of the standard library's, not a public one).
    """
    manager = getattr(pool, "_executor_manager_thread", None)
    if manager is None:
        return None
    pool.shutdown(wait=False)        # pending blocks still run and their results arrive
    return manager


# --------------------------------------------------------------------------- the result

@dataclass(frozen=True)
class ResampleResult:
    """A finished resampling run.

    Attributes
    ----------
    summary : dict
        JSON-ready: ``{"resample", "rules", "frontiers", "sweep", "attribution",
        "self_check"}`` (see the README for every field; per-period decimals).
    table_frames : dict of str to DataFrame
        Tables for ``RUN/tables/<name>.csv``.
    arrays : dict of str to ndarray, or None
        Per-draw weights when ``keep_draws``.
    spec : ResampleSpec
        The resolved spec that produced it.
    """

    summary: dict
    table_frames: dict
    arrays: Optional[dict]
    spec: ResampleSpec

    def to_summary(self) -> dict:
        return self.summary

    def tables(self) -> dict:
        return self.table_frames

    def draw_arrays(self) -> Optional[dict]:
        return self.arrays


def _metric_dict(row, ppy, prefix="", suffix=""):
    """{expected_return, variance, volatility, sharpe, ceq} (+ annualised copies)."""
    er, var, vol, sh, ceq = (float(x) for x in row)
    out = {f"{prefix}expected_return{suffix}": er, f"{prefix}variance{suffix}": var,
           f"{prefix}volatility{suffix}": vol, f"{prefix}sharpe{suffix}": sh,
           f"{prefix}ceq{suffix}": ceq}
    out.update({f"{prefix}expected_return{suffix}_annualised": er * ppy,
                f"{prefix}variance{suffix}_annualised": var * ppy,
                f"{prefix}volatility{suffix}_annualised": vol * math.sqrt(ppy),
                f"{prefix}sharpe{suffix}_annualised": sh * math.sqrt(ppy),
                f"{prefix}ceq{suffix}_annualised": ceq * ppy})
    return out


def _finalize(spec: ResampleSpec, parts: dict) -> ResampleResult:
    import pandas as pd

    from .closed_form import kan_zhou, squared_sharpe

    ctx = _Context(spec)
    ppy = spec.periods_per_year
    mu, cov, gamma = ctx.mu, ctx.cov, ctx.gamma
    assets = list(spec.assets)
    main = parts[("main", -1)]
    n = main["draws"]
    tot = main["sums"].total
    cnt = main["counts"]
    names = list(spec.rule_names)
    tables = {}

    ew_w = np.full(ctx.n, 1.0 / ctx.n)
    rules_out = {}
    band_rows, pop_rows, att_rows = [], [], []
    ok = cnt["ok"]                                                   # (R,) draws with weights
    nr = np.maximum(ok, 1).astype(np.float64)
    m_mean, m_sd, m_se = moments_mean_sd_se(tot["m"])          # (R, 5)
    w_mean, w_sd, _ = moments_mean_sd_se(tot["w"])             # (R, N)
    c_mean, c_sd, _ = moments_mean_sd_se(tot["cash"])          # (R,)
    a_mean, a_sd, a_se = moments_mean_sd_se(tot["att"])        # (R, 2, 5)
    beats = cnt["beats"] / n                                                    # (R, 2)
    if ctx.pol is not None:
        beats_pol = cnt["beats_policy"] / n                                     # (R, 2)
        te_mean, te_sd, te_se = moments_mean_sd_se(tot["te"])                   # (R,)
    wmin, wmax = main["extrema"]["wmin"], main["extrema"]["wmax"]
    for i, rs in enumerate(spec.rules):
        if ok[i] == 0:
            raise InfeasibleError(f"rule '{rs.name}' found no allocation in any of the {n} "
                                  f"resampled histories: {main['notes'].get(rs.name)}")
        h = ctx.hists[i]
        hist = cnt[f"hist{i}"]
        weights = {}
        pcts = h.percentiles_rows(hist, PERCENTILES, wmin[i], wmax[i])
        for j, a in enumerate(assets):
            pct = pcts[j]
            entry = {"mean": float(w_mean[i, j]), "sd": float(w_sd[i, j])}
            entry.update({f"p{q}": v for q, v in zip(PERCENTILES, pct)})
            entry.update({"held": float(cnt["held"][i, j] / nr[i]), "min": float(wmin[i, j]),
                          "max": float(wmax[i, j])})
            weights[a] = entry
            band_rows.append({"rule": rs.name, "asset": a, **entry})
        opt_note = None
        try:
            opt = rs.rule.weights(mu, cov)
            opt_w = np.asarray(getattr(opt, "weights", opt), dtype=np.float64)
        except NoiseproofError as exc:
            # e.g. max-sharpe when no portfolio has a positive population mean: the rule has
            # no optimum; its losses against it are then undefined (NaN -> null)
            opt_note = " ".join(str(exc).split())
            opt_w = np.full(ctx.n, np.nan)
        opt_m = score(opt_w[None], mu, cov, gamma)[0]
        avg_m = score(w_mean[i][None], mu, cov, gamma)[0]
        pop = {}
        for k, metric in enumerate(METRICS):
            pop[f"{metric}_mean"] = float(m_mean[i, k])
            pop[f"{metric}_sd"] = float(m_sd[i, k])
            pop[f"{metric}_se"] = float(m_se[i, k])
            pop_rows.append({"rule": rs.name, "metric": metric, "mean": float(m_mean[i, k]),
                             "sd": float(m_sd[i, k]), "se": float(m_se[i, k]),
                             "optimum": float(opt_m[k]),
                             "resampled_allocation": float(avg_m[k])})
        pop.update({"expected_return_mean_annualised": pop["expected_return_mean"] * ppy,
                    "variance_mean_annualised": pop["variance_mean"] * ppy,
                    "volatility_mean_annualised": pop["volatility_mean"] * math.sqrt(ppy),
                    "sharpe_mean_annualised": pop["sharpe_mean"] * math.sqrt(ppy),
                    "ceq_mean_annualised": pop["ceq_mean"] * ppy})
        is_ew = i == ctx.ew
        for k, key in ((0, "ceq"), (1, "sharpe")):
            p = float(beats[i, k])
            pop[f"prob_beats_equal_weight_{key}"] = None if is_ew else p
            pop[f"prob_beats_equal_weight_{key}_se"] = (None if is_ew else
                                                        math.sqrt(p * (1 - p) / n))
        pop["draws_scored"] = int(ok[i])
        pop["draws_failed"] = int(n - ok[i])
        if n - ok[i]:
            pop["failure_note"] = main["notes"].get(rs.name)
        ew_ceq = float(m_mean[ctx.ew, 4])
        pop["ceq_gain_vs_equal_weight"] = float(m_mean[i, 4] - ew_ceq)
        if ctx.pol is not None:
            is_pol = i == ctx.pol
            for k, key in ((0, "ceq"), (1, "sharpe")):
                p = float(beats_pol[i, k])
                pop[f"prob_beats_policy_{key}"] = None if is_pol else p
                pop[f"prob_beats_policy_{key}_se"] = (None if is_pol else
                                                      math.sqrt(p * (1 - p) / n))
            pop["ceq_gain_vs_policy"] = float(m_mean[i, 4] - m_mean[ctx.pol, 4])
            pop["ceq_gain_vs_policy_annualised"] = pop["ceq_gain_vs_policy"] * ppy
            pop["sharpe_gain_vs_policy"] = float(m_mean[i, 3] - m_mean[ctx.pol, 3])
            pop["tracking_error_vs_policy_mean"] = float(te_mean[i])
            pop["tracking_error_vs_policy_sd"] = float(te_sd[i])
            pop["tracking_error_vs_policy_se"] = float(te_se[i])
            pop["tracking_error_vs_policy_mean_annualised"] = float(te_mean[i]) * math.sqrt(ppy)
        pop["ceq_loss_vs_optimum"] = float(opt_m[4] - m_mean[i, 4])
        pop["ceq_loss_vs_optimum_annualised"] = pop["ceq_loss_vs_optimum"] * ppy
        optimum = {"weights": dict(zip(assets, map(float, opt_w))),
                   "cash": float(1.0 - opt_w.sum()), **_metric_dict(opt_m, ppy)}
        if opt_note is not None:
            optimum["note"] = f"the rule has no allocation under the population: {opt_note}"
        resampled = {"weights": dict(zip(assets, map(float, w_mean[i]))),
                     "cash": float(c_mean[i]), **_metric_dict(avg_m, ppy)}
        entry = {"weights": weights, "cash": {"mean": float(c_mean[i]), "sd": float(c_sd[i])},
                 "resampled_allocation": resampled, "population": pop, "optimum": optimum,
                 "estimator": {"mean": rs.mean, "covariance": rs.covariance,
                               "params": _jsonable({k: v for k, v in rs.params.items()
                                                    if k not in ("given_mean",
                                                                 "given_covariance")})}}
        if ctx.attrib[i]:
            att = {"ceq_optimum": float(opt_m[4]),
                   "ceq_estimated_both": float(m_mean[i, 4]),
                   "ceq_estimated_both_se": float(m_se[i, 4]),
                   "ceq_true_mean_estimated_covariance": float(a_mean[i, 0, 4]),
                   "ceq_true_mean_estimated_covariance_se": float(a_se[i, 0, 4]),
                   "ceq_estimated_mean_true_covariance": float(a_mean[i, 1, 4]),
                   "ceq_estimated_mean_true_covariance_se": float(a_se[i, 1, 4])}
            att["loss_estimated_both"] = att["ceq_optimum"] - att["ceq_estimated_both"]
            att["loss_from_covariance_error"] = (att["ceq_optimum"]
                                                 - att["ceq_true_mean_estimated_covariance"])
            att["loss_from_mean_error"] = (att["ceq_optimum"]
                                           - att["ceq_estimated_mean_true_covariance"])
            entry["attribution"] = att
            for case, val, se in (("true mean and covariance", opt_m[4], 0.0),
                                  ("estimated mean and covariance", m_mean[i, 4], m_se[i, 4]),
                                  ("true mean, estimated covariance", a_mean[i, 0, 4],
                                   a_se[i, 0, 4]),
                                  ("estimated mean, true covariance", a_mean[i, 1, 4],
                                   a_se[i, 1, 4])):
                att_rows.append({"rule": rs.name, "case": case, "ceq_mean": float(val),
                                 "ceq_se": float(se), "ceq_loss": float(opt_m[4] - val)})
        rules_out[rs.name] = entry
    tables["weight_bands"] = pd.DataFrame(band_rows)
    tables["population_metrics"] = pd.DataFrame(pop_rows)
    if att_rows:
        tables["attribution"] = pd.DataFrame(att_rows)

    # per-draw metric distribution (first metric_sample draws)
    samples = main["samples"]
    if "metrics" in samples:
        ms = np.concatenate(samples["metrics"])
        qs = np.round(np.arange(1, 100) / 100.0, 2)
        qrows = []
        for i, name in enumerate(names):
            with np.errstate(invalid="ignore"):
                qv = np.nanquantile(ms[:, i, :], qs, axis=0)   # (99, 5); failed draws left out
            for k, metric in enumerate(METRICS):
                for q, v in zip(qs, qv[:, k]):
                    qrows.append({"rule": name, "metric": metric, "quantile": float(q),
                                  "value": float(v)})
        tables["population_quantiles"] = pd.DataFrame(qrows)
        # the cloud of per-draw allocations judged under the population (first draws of each
        # rule that uses inputs), drawn beside the frontiers
        er, vo = METRICS.index("expected_return"), METRICS.index("volatility")
        crows = []
        for i, name in enumerate(names):
            if not _uses_inputs(spec.rules[i]):
                continue
            sub = ms[:CLOUD_DRAWS, i, :]
            for d in np.flatnonzero(np.isfinite(sub[:, er]) & np.isfinite(sub[:, vo])):
                crows.append({"rule": name, "draw": int(d), "expected_return": float(sub[d, er]),
                              "volatility": float(sub[d, vo])})
        if crows:
            tables["frontier_cloud"] = pd.DataFrame(crows)

    # frontiers
    frontiers = {"skipped": "no rule uses both means and covariances (or frontier_points < 2)"}
    fi = ctx.frontier_index
    if fi is not None:
        from optimise import efficient_frontier

        nf_failed = int(cnt["frontier_draws"][1])
        k = spec.frontier_points
        fr_mean, fr_sd, fr_se = moments_mean_sd_se(tot["fr"])          # (K, 4)
        fw = moments_mean_sd_se(tot["fw"])[0]                            # (K, N)
        cons, cons_text = ctx.frontier_constraints
        true_p = np.asarray(efficient_frontier(mu, cov, cons).points(k), dtype=np.float64)
        true_m = score(true_p, mu, cov, gamma)
        avg_m = score(fw, mu, cov, gamma)
        rows = []
        for r in range(k):
            rows.append({"rank": r,
                         "true_expected_return": float(true_m[r, 0]),
                         "true_volatility": float(true_m[r, 2]),
                         "estimated_expected_return": float(fr_mean[r, 0]),
                         "estimated_volatility": float(math.sqrt(max(fr_mean[r, 1], 0.0))),
                         "actual_expected_return": float(fr_mean[r, 2]),
                         "actual_volatility": float(math.sqrt(max(fr_mean[r, 3], 0.0))),
                         "averaged_expected_return": float(avg_m[r, 0]),
                         "averaged_volatility": float(avg_m[r, 2]),
                         "estimated_expected_return_se": float(fr_se[r, 0]),
                         "actual_expected_return_se": float(fr_se[r, 2])})
        tables["frontiers"] = pd.DataFrame(rows)
        aw = pd.DataFrame(fw, columns=assets)
        aw.insert(0, "rank", np.arange(k))
        tables["averaged_frontier_weights"] = aw
        frontiers = {
            "rule": spec.rules[fi].name, "points": k, "draws": int(cnt["frontier_draws"][0]),
            "draws_failed": nf_failed, "failure_note": main["notes"].get("frontier"),
            "estimator": {"mean": spec.rules[fi].mean, "covariance": spec.rules[fi].covariance},
            "constraints": cons_text,
            "broadie_violations": int(cnt["broadie_violations"][0]),
            "volatility_convention": "root of the mean variance over draws at each rank",
            **{col: [row[col] for row in rows] for col in rows[0] if col != "rank"},
            "averaged_weights": {a: [float(x) for x in fw[:, j]] for j, a in enumerate(assets)},
        }

    # sweep
    sweep = {"skipped": "no sweep lengths"}
    if spec.sweep_lengths:
        srows = []
        per_rule = {name: {"lengths": [], "years": [], "prob_beats_equal_weight_ceq": [],
                           "prob_beats_equal_weight_sharpe": [], "ceq_mean": [], "ceq_se": []}
                    for name in names}
        for kk, t in enumerate(spec.sweep_lengths):
            p = parts[("sweep", kk)]
            ns = p["draws"]
            sm, ssd, sse = moments_mean_sd_se(p["sums"].total["m"])
            valid = ctx.sweep_valid(int(t))
            for i, name in enumerate(names):
                ok = valid[i]
                pb = float(p["counts"]["beats"][i, 0] / ns) if ok and i != ctx.ew else None
                ps = float(p["counts"]["beats"][i, 1] / ns) if ok and i != ctx.ew else None
                d = per_rule[name]
                if ctx.pol is not None:
                    mine = ok and i != ctx.pol and valid[ctx.pol]
                    qb = float(p["counts"]["beats_policy"][i, 0] / ns) if mine else None
                    qs = float(p["counts"]["beats_policy"][i, 1] / ns) if mine else None
                    d.setdefault("prob_beats_policy_ceq", []).append(qb)
                    d.setdefault("prob_beats_policy_sharpe", []).append(qs)
                d["lengths"].append(int(t))
                d["years"].append(float(t) / ppy)
                d["prob_beats_equal_weight_ceq"].append(pb)
                d["prob_beats_equal_weight_sharpe"].append(ps)
                d["ceq_mean"].append(float(sm[i, 4]) if ok else None)
                d["ceq_se"].append(float(sse[i, 4]) if ok else None)
                srows.append({"rule": name, "length": int(t), "years": float(t) / ppy,
                              "draws": ns, "prob_beats_equal_weight_ceq": pb,
                              "prob_beats_equal_weight_sharpe": ps,
                              "ceq_mean": float(sm[i, 4]) if ok else None,
                              "ceq_se": float(sse[i, 4]) if ok else None,
                              "too_short": not ok,
                              "draws_failed": int(ns - p["counts"]["ok"][i]) if ok else None})
                if ctx.pol is not None:
                    srows[-1]["prob_beats_policy_ceq"] = qb
                    srows[-1]["prob_beats_policy_sharpe"] = qs
        for i, name in enumerate(names):
            d = per_rule[name]
            if i == ctx.ew:
                d["note"] = "1/N is the comparison"
                continue
            order = np.argsort(d["lengths"], kind="stable")
            for level in (50, 90):
                hit = [d["lengths"][j] for j in order
                       if d["prob_beats_equal_weight_ceq"][j] is not None
                       and d["prob_beats_equal_weight_ceq"][j] >= level / 100.0]
                d[f"shortest_length_{level}"] = int(hit[0]) if hit else None
                d[f"shortest_years_{level}"] = float(hit[0]) / ppy if hit else None
                d[f"shortest_{level}_text"] = (f"{hit[0]} periods ({hit[0] / ppy:g} years)"
                                               if hit else "none of the tried lengths")
        sweep = {"draws": spec.n_sweep_draws, "lengths": [int(t) for t in spec.sweep_lengths],
                 "draw_paths": [draw_path(spec, int(t), strict=False)[0]
                                for t in spec.sweep_lengths],
                 "years": [float(t) / ppy for t in spec.sweep_lengths], "rules": per_rule}
        tables["sweep"] = pd.DataFrame(srows)

    # self-check (Kan & Zhou 2007)
    applies, reason = _self_check_applies(spec)
    if applies:
        p = parts[("check", -1)]
        nc = p["draws"]
        um, usd, use = moments_mean_sd_se(p["sums"].total["u"])
        th2 = squared_sharpe(mu, cov)
        kz = kan_zhou(th2, ctx.n, spec.length, gamma)
        z = (float(um) - kz.expected_utility) / float(use)
        self_check = {
            "check": "expected utility of the plug-in cash-budget mean-variance rule "
                     "w = S^-1 m / gamma with the divisor-T covariance, normal histories "
                     "from the population (Kan & Zhou 2007, JFQA 42(3))",
            "length": spec.length, "n_assets": ctx.n, "risk_aversion": gamma,
            "draws": nc, "theta2": th2, "k1": kz.k1, "k2": kz.k2,
            "expected_utility_closed_form": kz.expected_utility,
            "expected_utility_monte_carlo": float(um), "monte_carlo_se": float(use),
            "standardised_difference": z, "within_3_se": bool(abs(z) < 3.0),
            "optimum_utility": kz.optimum,
            "draw_path": ctx.path(Block(0, 0, 0, "check", spec.length, -1)),
            "generator": "normal",
            "setting": ("the study's own generator (normal)" if spec.generator == "normal" else
                        f"normal draws from the study's population moments: the study's "
                        f"'{spec.generator}' generator has no closed form"),
        }
    else:
        self_check = {"skipped": reason}

    gen = ctx.generator.describe()
    path, path_reason = draw_path(spec, spec.length)
    resample = {
        "generator": gen, "draws": spec.draws, "length": spec.length, "T": spec.length,
        "seed": spec.seed, "n_assets": ctx.n, "assets": assets,
        "draw_path": path, "draw_setting": spec.draw,
        "draw": f"{path} (setting '{spec.draw}')",
        "draw_path_reason": path_reason,
        "chunk_draws": CHUNK_DRAWS, "block_draws": spec.block_draws,
        "tile_draws": tile_draws(spec, spec.length, path),
        "risk_aversion": gamma, "hold_threshold": spec.hold_threshold,
        "weight_percentile_resolution": WEIGHT_BIN / 2,
        "percentile_definition": "inverted empirical distribution function on fixed bins of "
                                 f"width {WEIGHT_BIN} (bin midpoints; exact zeros kept apart)",
        "frontier_points": spec.frontier_points,
        "metric_sample_draws": min(spec.metric_sample, spec.draws),
        "population": {"source": spec.population_source,
                       "mean": dict(zip(assets, map(float, mu))),
                       "volatility": dict(zip(assets, map(float, np.sqrt(np.diag(cov))))),
                       "covariance_divisor": "T" if spec.history is not None else None},
        "equal_weight": _metric_dict(score(ew_w[None], mu, cov, gamma)[0], ppy),
        "policy": spec.policy,
        "estimators": {rs.name: {"mean": rs.mean, "covariance": rs.covariance}
                       for rs in spec.rules},
        "spec_fingerprint": spec.fingerprint(),
    }
    summary = {"resample": resample, "rules": rules_out, "frontiers": frontiers,
               "sweep": sweep, "attribution": {name: rules_out[name]["attribution"]
                                               for name in names
                                               if "attribution" in rules_out[name]},
               "self_check": self_check}
    arrays = None
    if spec.keep_draws and "weights" in samples:
        w_all = np.concatenate(samples["weights"])
        arrays = {"weights": w_all, "rules": np.array(names), "assets": np.array(assets)}
    return ResampleResult(summary=_jsonable(summary), table_frames=tables, arrays=arrays,
                          spec=spec)
