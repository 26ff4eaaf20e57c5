"""Resampling engine: does an optimised allocation survive input noise?

Public API (see CONTRACTS.md): :class:`ResampleSpec`, :class:`RuleSpec`,
:func:`run_resampling`, :class:`ResampleResult`, and the block API used by batch
runners (:func:`block_plan`, :func:`run_block`, :class:`BlockResult`,
:func:`merge_blocks`).
"""
from .engine import (  # noqa: F401
    auto_block_draws,
    chunk_generator,
    METRICS,
    PERCENTILES,
    Block,
    BlockResult,
    ResampleResult,
    ResampleSpec,
    RuleSpec,
    block_plan,
    block_seconds,
    merge_blocks,
    pin_one_blas_thread,
    retain_freed_memory,
    run_block,
    run_resampling,
    score,
    tile_draws,
)
from .generators import (  # noqa: F401
    GENERATORS,
    fit_degrees_of_freedom,
    make_generator,
    optimal_block_length,
    population_moments,
)
from .stats import CHUNK_DRAWS  # noqa: F401
from .closed_form import kan_zhou, squared_sharpe  # noqa: F401

__all__ = [
    "ResampleSpec", "RuleSpec", "ResampleResult", "run_resampling", "Block", "BlockResult",
    "block_plan", "block_seconds", "run_block", "merge_blocks", "score", "retain_freed_memory",
    "pin_one_blas_thread", "tile_draws", "auto_block_draws", "METRICS", "PERCENTILES",
    "GENERATORS", "make_generator", "population_moments", "fit_degrees_of_freedom",
    "optimal_block_length", "CHUNK_DRAWS", "kan_zhou", "squared_sharpe",
]
