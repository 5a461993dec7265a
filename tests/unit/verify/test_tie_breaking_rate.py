"""The tie-breaking check's false-alarm rate, computed exactly.

The check fails when the chi-square p-value of the counts of 4 tied actions
among ``N`` fresh agents is below ``TIE_P_VALUE``. For an agent that breaks
ties uniformly the counts are Multinomial(N, 1/4 each), so the exact
false-alarm rate is the total probability of the outcomes whose Pearson
statistic reaches the threshold: summed here over every outcome (Pearson
1900 for the statistic; the chi-square tail is only its large-sample
approximation, Cochran 1954). Nothing is sampled, so the result is exact up to
rounding.
"""

from __future__ import annotations

import numpy as np
from scipy.special import gammaln

from tdkit.stats import chi2_sf
from tdkit.verify.checks import TIE_AGENTS, TIE_P_VALUE


def critical_statistic(p_value: float, df: int = 3) -> float:
    """The statistic at which the check's own ``chi2_sf`` crosses ``p_value`` (bisection)."""
    low, high = 0.0, 1e4
    for _ in range(200):
        mid = (low + high) / 2
        low, high = (mid, high) if chi2_sf(mid, df) >= p_value else (low, mid)
    return high


def exact_false_alarm_rate(n: int, p_value: float) -> float:
    """P(chi2_sf(X^2, 3) < p_value) under Multinomial(n, 1/4 each)."""
    critical = critical_statistic(p_value)
    expected = n / 4
    log_norm = gammaln(n + 1) - n * np.log(4)
    log_fact = gammaln(np.arange(n + 1) + 1)
    total = 0.0
    for n1 in range(n + 1):
        for n2 in range(n + 1 - n1):
            n3 = np.arange(n + 1 - n1 - n2)
            n4 = n - n1 - n2 - n3
            x2 = ((n1 - expected) ** 2 + (n2 - expected) ** 2 + (n3 - expected) ** 2
                  + (n4 - expected) ** 2) / expected
            fails = x2 >= critical
            if fails.any():
                total += float(np.exp(log_norm - log_fact[n1] - log_fact[n2]
                                      - log_fact[n3[fails]] - log_fact[n4[fails]]).sum())
    return total


def test_the_critical_statistic_is_where_the_p_value_crosses_the_threshold():
    c = critical_statistic(TIE_P_VALUE)
    assert chi2_sf(c * (1 - 1e-9), 3) >= TIE_P_VALUE > chi2_sf(c * (1 + 1e-9), 3)


def test_the_quick_level_tie_check_false_alarms_at_most_1_2e_6_per_run():
    rate = exact_false_alarm_rate(TIE_AGENTS["quick"], TIE_P_VALUE)
    assert 0.5e-6 < rate < 1.25e-6, rate  # close to the nominal 1e-6, and below 1.25e-6


def test_first_index_wins_is_far_beyond_the_threshold():
    n = TIE_AGENTS["quick"]
    counts = np.array([n, 0, 0, 0])
    statistic = float(((counts - n / 4) ** 2 / (n / 4)).sum())
    assert chi2_sf(statistic, 3) < 1e-100 < TIE_P_VALUE
