"""Calibrate the verifier's average-reward check: false alarms on correct learners, power on bugs.

Runs ``tdkit.verify._average_checks.check_average_reward`` for tdkit's three
average-reward learners (with the factories a team would use, as in
tests/unit/learners/test_differential.py) over many seeds and counts failures, which are
false alarms: the check's margin is derived for a rate of 1e-5. With zero
failures in n seeds the one-sided 95% upper bound on the rate is
1 - 0.05**(1/n) (about 3/n). It then runs three deliberately broken learners
and counts how often the check catches them (its power).

    python benchmarks/calibrate_average_check.py            # 300 seeds
    python benchmarks/calibrate_average_check.py --seeds 1000
    python benchmarks/calibrate_average_check.py --smoke    # 3 seeds, a quick look
"""

from __future__ import annotations

import argparse
import re
import time

import numpy as np

import tdkit
from tdkit.schedules import Exponential
from tdkit.verify._average_checks import check_average_reward


def _factory(cls, decaying: bool = False):
    def make(env, seed):
        if cls is tdkit.DifferentialTD:
            n, m = env.observation_space.n, env.action_space.n
            return cls.for_env(env, policy=np.full((n, m), 1.0 / m), seed=seed)
        if decaying:  # on-policy with exploration decaying to 0.01 (GLIE)
            return cls.for_env(env, exploration=Exponential(0.2, 0.999, 0.01), seed=seed)
        return cls.for_env(env, seed=seed)

    return make


#: (label, factory): the defaults (constant epsilon 0.1), and SARSA with decaying epsilon.
LEARNERS = [
    ("DifferentialQLearning", _factory(tdkit.DifferentialQLearning)),
    ("DifferentialSarsa", _factory(tdkit.DifferentialSarsa)),
    ("DifferentialSarsa, decaying", _factory(tdkit.DifferentialSarsa, decaying=True)),
    ("DifferentialTD", _factory(tdkit.DifferentialTD)),
]


def _numbers(message: str) -> tuple[float, float, float, float]:
    """(learned gain, allowed error, lowest and highest accepted target) from the message."""
    gain = float(re.search(r"learned gain ([-\d.]+)", message)[1])
    allowed = float(re.search(r"allowed ([\d.]+)", message)[1])
    exact = float(re.search(r"exact ([-\d.]+)", message)[1])
    band = re.search(r"epsilon-greedy gain ([-\d.]+)-([-\d.]+)", message)
    low = min(exact, float(band[1])) if band else exact
    return gain, allowed, low, exact


def _normal_model_rate(gains, allowed, lows, highs) -> float:
    """Mean over runs of P(gain outside the run's accepted interval), gain ~ N(mean, sd).

    A model, not a measurement: the gains of the runs are taken as normal
    across seeds, and each run's margin and targets as it had them.
    """
    from scipy.stats import norm

    mu, sd = float(np.mean(gains)), float(np.std(gains, ddof=1))
    a, lo, hi = np.asarray(allowed), np.asarray(lows), np.asarray(highs)
    return float(np.mean(norm.cdf((lo - a - mu) / sd) + norm.sf((hi + a - mu) / sd)))


class TimeLimitIsTerminal(tdkit.DifferentialQLearning):
    """Bug: the time limit is read as the end of the task."""

    def observe(self, obs, action, reward, next_obs, terminated, truncated, *, next_mask=None):
        super().observe(obs, action, reward, next_obs, terminated or truncated, False,
                        next_mask=next_mask)


class AverageOfRewards(tdkit.DifferentialQLearning):
    """Bug: the average follows the rewards seen (the behaviour's gain), not the TD error."""

    def _differential_step(self, s, a, target):
        return self._td_step(self._values, self._visits, s, a, target)

    def observe(self, obs, action, reward, *args, **kwargs):
        super().observe(obs, action, reward, *args, **kwargs)
        self.average_reward += 0.01 * (reward - self.average_reward)


class NoAverage(tdkit.DifferentialQLearning):
    """Bug: the average is never learned."""

    def _differential_step(self, s, a, target):
        return self._td_step(self._values, self._visits, s, a, target)


def _bug(cls):
    return lambda env, seed: cls.for_env(env, exploration=0.3, seed=seed)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--seeds", type=int, default=300)
    parser.add_argument("--bug-seeds", type=int, default=30)
    parser.add_argument("--smoke", action="store_true", help="3 seeds each")
    args = parser.parse_args()
    seeds = 3 if args.smoke else args.seeds
    bug_seeds = 3 if args.smoke else args.bug_seeds
    print(f"false alarms of check_average_reward over seeds 1-{seeds} (derived for 1e-5 per "
          "run):")
    for label, make in LEARNERS if seeds else []:
        start = time.perf_counter()
        failures, gains, allowed, lows, highs = [], [], [], [], []
        for seed in range(1, seeds + 1):
            passed, message = check_average_reward(make, seed)
            gain, margin, low, high = _numbers(message)
            gains.append(gain)
            allowed.append(margin)
            lows.append(low)
            highs.append(high)
            if not passed:
                failures.append(seed)
        bound = 1.0 - 0.05 ** (1.0 / max(seeds, 1)) if not failures else float("nan")
        print(
            f"  {label:<28} {len(failures)}/{seeds} failed {failures[:10]}; "
            f"gain mean {np.mean(gains):.4f} sd {np.std(gains, ddof=1):.4f}; allowed error "
            f"mean {np.mean(allowed):.3f} least {np.min(allowed):.3f}; 95% upper bound on "
            f"the rate {bound:.4f}; normal-model rate per run "
            f"{_normal_model_rate(gains, allowed, lows, highs):.1g}; "
            f"{time.perf_counter() - start:.0f} s"
        )
    print(f"power against bugs over {bug_seeds} seeds (fraction caught):")
    for cls in (TimeLimitIsTerminal, AverageOfRewards, NoAverage):
        caught = sum(not check_average_reward(_bug(cls), seed)[0]
                     for seed in range(1, bug_seeds + 1))
        print(f"  {cls.__name__:<22} {caught}/{bug_seeds}")


if __name__ == "__main__":
    main()
