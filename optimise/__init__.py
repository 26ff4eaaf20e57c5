"""Portfolio rules, constraints, the active-set QP solver and the critical line algorithm.

Public names (see CONTRACTS.md):

* :func:`make_constraints`, :class:`Constraints`: budget, long-only, asset and group bounds,
  checked for feasibility when made;
* :func:`make_rule`, :data:`RULE_TYPES`, :class:`Rule`, :class:`Allocation`: the rule
  registry; ``Rule.weights`` for one problem, ``Rule.weights_batch`` for D problems;
* :func:`efficient_frontier`, :class:`Frontier`: the exact long-only / box-bounded frontier
  by the critical line algorithm;
* :func:`kkt_residuals`, :class:`KKTResiduals`: the optimality certificate other parts can
  use to check a solution.

Units: per-period decimals throughout.
"""
from .cla import Frontier, efficient_frontier
from .constraints import Constraints, make_constraints
from .kkt import KKTResiduals, kkt_residuals
from .rules import RULE_PARAMS, RULE_TYPES, TE_TYPES, Allocation, Rule, make_rule, tracking_error

__all__ = [
    "Constraints", "make_constraints",
    "Rule", "Allocation", "make_rule", "RULE_TYPES", "RULE_PARAMS", "TE_TYPES", "tracking_error",
    "Frontier", "efficient_frontier",
    "KKTResiduals", "kkt_residuals",
]
