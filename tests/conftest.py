"""Shared test fixtures: deterministic moment recipes from ../shared/REFERENCES.md section 0."""
import numpy as np
import pytest


def recipe_a(n: int):
    """Recipe A (REFERENCES.md section 0): vol_i = 0.04 + 0.004 i, corr 0.5^|i-j|, mu_i = 0.005 + 0.0005 i."""
    i = np.arange(n)
    vol = 0.04 + 0.004 * i
    corr = 0.5 ** np.abs(i[:, None] - i[None, :])
    mu = 0.005 + 0.0005 * i
    return mu, corr * np.outer(vol, vol)


def recipe_b():
    """Recipe B (REFERENCES.md section 0): 4 assets, annual."""
    mu = np.array([0.06, 0.08, 0.10, 0.12])
    vol = np.array([0.10, 0.15, 0.20, 0.25])
    corr = np.array([[1, .3, .2, .1], [.3, 1, .4, .2], [.2, .4, 1, .5], [.1, .2, .5, 1]])
    return mu, corr * np.outer(vol, vol)


@pytest.fixture
def rng():
    return np.random.default_rng(20261202)
