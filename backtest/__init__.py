"""Rolling out-of-sample backtests of portfolio rules against 1/N, with costs and tests.

Public API::

    from backtest import BacktestConfig, run_backtest, BacktestResult

See :func:`backtest.run_backtest` for the timing convention, drift, turnover and
costs, and :mod:`backtest.stats` for the statistics (Jobson-Korkie-Memmel,
Ledoit-Wolf bootstrap, CEQ delta method, Lo, probabilistic and deflated Sharpe
ratios, minimum track record length).
"""
from .engine import EQUAL_WEIGHT, BacktestConfig, run_backtest
from .result import BacktestResult, SeriesMeasures

__all__ = ["BacktestConfig", "run_backtest", "BacktestResult", "SeriesMeasures", "EQUAL_WEIGHT"]
