"""The invented demo market: a fictional institution's ten asset sleeves, seeded and documented.

See :mod:`demo_market.model` for the model; ``python -m demo_market`` regenerates
``data/demo_returns.csv`` and ``data/demo_cash.csv`` byte for byte, and
``data/study.toml`` is an example study file using them. All names and numbers
are invented and illustrative: no real institution, index or market data.
"""
