"""Honest error bars in every regime: pulls and coverage of the fit's standard errors.

Records from an inverse FFT of a known spectrum (random phases, chi-square
amplitudes; ``tests/oscillator_records.py``, independent of the fitter and of the
simulated laboratory) in the regimes of ``tests/fit_regimes.py``: a narrow line, a
broad line, a weak line on a strong floor, two close lines, a line near DC and one
near Nyquist. For Gaussian pulls ``(estimate - truth) / stderr`` the intervals of 1
and 1.96 standard errors cover 68.27 % and 95.00 % (normal quantiles, scipy.stats), and
the standard deviation of the pulls is 1.

Tolerances are set by the binomial scatter of the coverage and the chi-square scatter
of the pulls' standard deviation over the number of spectra, so that the slow tests
fail for error bars 10 % too small: with 1000 spectra, such errors give a pull standard
deviation of 1.11 (limit 1.065, 2.9 of its standard errors of 0.022 away from 1 and 2
below 1.11), and a 95 % coverage of 92.5 % (limit 93.0 %, 3.5 binomial standard
errors below 95.4 %).
"""

from __future__ import annotations

import math

import fit_regimes
import numpy as np
import pytest
import scipy.stats

Z68 = float(scipy.stats.norm.ppf(0.5 + 0.6827 / 2))  # 1.0
Z95 = float(scipy.stats.norm.ppf(0.975))  # 1.96


def _check(measured, n, sd_limit, c95_low, c68_low):
    pulls = measured.pulls()
    for j in range(pulls.shape[1]):
        for q, name in enumerate(("f0", "gamma", "area")):
            pull = pulls[:, j, q]
            sd = float(np.std(pull, ddof=1))
            c68 = float(np.mean(np.abs(pull) < Z68))
            c95 = float(np.mean(np.abs(pull) < Z95))
            where = (j, name, round(sd, 3), round(c68, 3), round(c95, 3))
            assert 0.88 < sd < sd_limit, where  # f0 of close lines: about 7 % conservative
            assert c68 > c68_low, where
            assert c95 > c95_low, where
            assert abs(float(np.mean(pull))) < 0.35, where


@pytest.mark.slow
@pytest.mark.parametrize("regime", sorted(fit_regimes.REGIMES))
def test_pulls_and_coverage_per_regime(regime):
    n = 1000
    m = fit_regimes.measure(regime, n, seed=7)
    # sd of a pull sd over 1000 spectra: 1/sqrt(2 * 1000) = 0.022; binomial scatter of
    # the coverage: 1.5 % (68 %), 0.7 % (95 %)
    _check(m, n, sd_limit=1.065, c95_low=0.930, c68_low=0.640)
    assert m.failed <= n // 100
    # the estimator's variance against the Cramer-Rao bound of the full periodogram;
    # the variance of 1000 estimates scatters by sqrt(2/1000) = 4.5 %
    assert np.all(m.crb_ratio() < 1.10 + 2 * math.sqrt(2.0 / n)), m.crb_ratio()


def test_pulls_and_coverage_broad_line_fast():
    # 120 spectra: only gross errors (a bias, or error bars 30 % off) fail here;
    # the slow test above measures the coverage.
    n = 120
    m = fit_regimes.measure("broad", n, seed=3)
    _check(m, n, sd_limit=1.2, c95_low=0.89, c68_low=0.58)


def test_the_check_fails_for_error_bars_ten_percent_too_small():
    # The slow test's limits applied to pulls of a known law: Gaussian pulls 10 % too
    # wide (error bars 10 % too small) over 1000 spectra fail them in nearly every draw.
    rng = np.random.default_rng(5)
    failed = 0
    for _ in range(50):
        pull = 1.1 * rng.standard_normal(1000)
        sd = np.std(pull, ddof=1)
        c95 = np.mean(np.abs(pull) < Z95)
        failed += bool(sd >= 1.065 or c95 <= 0.930)
    assert failed >= 45
    passed = 0
    for _ in range(50):
        pull = rng.standard_normal(1000)
        sd = np.std(pull, ddof=1)
        c95 = np.mean(np.abs(pull) < Z95)
        c68 = np.mean(np.abs(pull) < Z68)
        passed += bool(0.88 < sd < 1.065 and c95 > 0.930 and c68 > 0.640)
    assert passed >= 45
