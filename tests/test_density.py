"""The kernel density estimate behind the report's figure of replicated densities."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from contenders.statistics.checks import binned_density, silverman_bandwidth


def test_silverman_bandwidth_is_the_rule_of_thumb():
    # Silverman (1986), "Density Estimation for Statistics and Data Analysis", eq. 3.31:
    # h = 0.9 min(SD, IQR / 1.34) n^(-1/5); SD and IQR from SciPy.
    rng = np.random.default_rng(7)
    y = rng.standard_t(3, size=500)
    expected = 0.9 * min(stats.tstd(y), stats.iqr(y) / 1.34) * 500 ** -0.2
    assert silverman_bandwidth(np.r_[y, np.nan]) == pytest.approx(expected, rel=1e-12)
    # a constant sample has neither spread: the bandwidth falls back to 1 n^(-1/5)
    assert silverman_bandwidth(np.full(32, 3.0)) == pytest.approx(0.9 * 32 ** -0.2)


def test_binned_density_of_normal_data_is_the_normal_convolved_with_the_kernel():
    # Closed form: a Gaussian kernel of SD h over N(0, 1) data estimates N(0, 1 + h^2)
    # (the convolution of two normals), here against SciPy's norm.pdf. Monte Carlo SD of
    # the estimate about sqrt(f / (n h 2 sqrt(pi))) < 0.002 at n = 200,000, h = 0.3.
    rng = np.random.default_rng(11)
    h = 0.3
    grid, dens = binned_density(rng.normal(size=200_000), -5.0, 5.0, h)
    assert grid.shape == (240,) and dens.shape == (1, 240)
    assert np.abs(dens[0] - stats.norm(0, np.sqrt(1 + h ** 2)).pdf(grid)).max() < 0.01
    assert dens[0].sum() * (grid[1] - grid[0]) == pytest.approx(1.0, abs=1e-3)


def test_values_beyond_the_grid_count_in_the_total_only():
    # half of each row lies beyond the grid, so each density integrates to one half; one
    # density per row
    rng = np.random.default_rng(3)
    rows = np.c_[rng.uniform(0, 1, size=(2, 400)), np.full((2, 400), 50.0)]
    grid, dens = binned_density(rows, -1.0, 2.0, 0.05)
    assert dens.shape == (2, 240)
    assert dens.sum(axis=1) * (grid[1] - grid[0]) == pytest.approx([0.5, 0.5], abs=1e-3)
