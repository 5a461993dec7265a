"""Running the checks: :func:`verify_agent`, :func:`assert_agent`, :func:`run_check`."""

from __future__ import annotations

import numbers
from collections.abc import Callable
from typing import Any

from .._errors import InvalidParameterError
from ._driver import AgentFault, agent_kind, build_agent
from ._report import SKIPPED, CheckResult, VerificationReport
from .checks import CHECKS, LEVELS, Context, check_name, check_protocol
from .probes import discount_probe

__all__ = ["CHECK_NAMES", "assert_agent", "run_check", "verify_agent"]

#: Names of the checks, in running order.
CHECK_NAMES: tuple[str, ...] = tuple(check_name(c) for c in CHECKS)

#: Checks that judge learned values against a discounted fixed point (Q*, the
#: epsilon-greedy fixed point, discounted probe values). An average-reward agent
#: (one with an ``average_reward`` attribute) learns differential values instead,
#: which these do not describe; its values are judged by ``average_reward``, and
#: a continuing-task learner carries a terminating transition into the next
#: episode's start on purpose, which ``episode_boundaries`` would flag.
DISCOUNTED_CHECKS = frozenset({
    "masks", "terminal", "truncation", "both_flags", "discounted_returns", "next_action",
    "state_encoding", "episode_boundaries", "convergence",
})

_AVERAGE_SKIP = (
    "average-reward agent: its differential values are not discounted values, so this "
    "discounted probe does not apply; the gain is checked by average_reward"
)


def _validate(owner: str, make_agent: Any, level: Any, seed: Any) -> None:
    if not callable(make_agent):
        raise InvalidParameterError(
            f"{owner}: make_agent must be a callable make_agent(env, seed) -> agent; got "
            f"{make_agent!r:.80}. Pass the factory itself, e.g. "
            "lambda env, seed: MyAgent.for_env(env, seed=seed)."
        )
    if level not in LEVELS:
        raise InvalidParameterError(
            f"{owner}: level must be 'quick' or 'full'; got {level!r}."
        )
    if isinstance(seed, bool) or not isinstance(seed, numbers.Integral) or seed < 0:
        raise InvalidParameterError(
            f"{owner}: seed must be a non-negative int; got {seed!r}."
        )


def _describe_factory(make_agent: Any) -> str:
    name = getattr(make_agent, "__qualname__", None) or type(make_agent).__name__
    module = getattr(make_agent, "__module__", None)
    return f"{module}:{name}" if module and name != "<lambda>" else name


def _prepare(make_agent: Any, level: str, seed: int) -> tuple[CheckResult, Context, str]:
    """Run the protocol check; return it, the context for the rest and the agent's name."""
    ctx = Context(make_agent, level, int(seed))
    protocol = check_protocol(ctx)
    agent_name = "agent"
    if not protocol.failed:
        env = discount_probe().make_env()
        try:
            agent = build_agent(make_agent, env, int(seed))
        except AgentFault:  # pragma: no cover - the protocol check built one already
            agent = None
        if agent is not None:
            obs, _ = env.reset(seed=int(seed))
            ctx = Context(make_agent, level, int(seed), agent_kind(agent, obs))
            agent_name = type(agent).__name__
    return protocol, ctx, agent_name


def verify_agent(
    make_agent: Callable[[Any, int], Any], *, level: str = "quick", seed: int = 0
) -> VerificationReport:
    """Run every check on agents built by ``make_agent`` and return the report.

    Parameters
    ----------
    make_agent : callable
        ``make_agent(env, seed) -> agent``. ``env`` is a gymnasium environment
        with ``Discrete`` spaces built by the verifier; its discount is
        ``env.unwrapped.gamma`` and the agent should use it (``for_env`` of
        tdkit learners does). The agent needs ``act``, ``observe`` and
        ``update``; ``q_values(obs)`` or ``values(obs)`` enable the value
        checks. Choose hyper-parameters that learn a 3-state problem in a few
        hundred episodes (step size 0.1-0.5); on-policy agents should decay
        their exploration for the convergence check.
    level : {"quick", "full"}
        ``"quick"`` (a few seconds): one seed per check, one convergence
        problem. ``"full"``: three seeds, more convergence problems, more
        tie-breaking samples.
    seed : int, default 0
        Root of every seed the verifier uses; the same seed gives the same
        report.

    Returns
    -------
    VerificationReport
        One :class:`CheckResult` per check (see :data:`CHECK_NAMES`);
        ``report.passed`` is False if any check failed. When the protocol
        check fails the other checks are skipped.

    Raises
    ------
    InvalidParameterError
        If ``make_agent`` is not callable, ``level`` is unknown or ``seed``
        is not a non-negative int.

    Examples
    --------
    >>> import tdkit
    >>> from tdkit.verify import verify_agent
    >>> report = verify_agent(lambda env, seed: tdkit.QLearning.for_env(
    ...     env, step_size=0.5, exploration=0.1, seed=seed))
    >>> report.passed, report["terminal"].status
    (True, 'passed')
    """
    _validate("verify_agent", make_agent, level, seed)
    protocol, ctx, agent_name = _prepare(make_agent, level, seed)
    results = [protocol]
    for check in CHECKS[1:]:
        name = check_name(check)
        if protocol.failed:
            results.append(CheckResult(name, SKIPPED, "not run: the protocol check failed"))
        elif _skipped_for_average_reward(ctx, name):
            results.append(CheckResult(name, SKIPPED, _AVERAGE_SKIP))
        else:
            results.append(check(ctx))
    return VerificationReport(
        tuple(results), level, int(seed), agent=agent_name,
        kind=ctx.kind.label if ctx.kind is not None else "",
        factory=_describe_factory(make_agent),
    )


def _skipped_for_average_reward(ctx: Context, name: str) -> bool:
    """True when check ``name`` does not apply because the agent learns an average reward."""
    return ctx.kind is not None and ctx.kind.average_reward and name in DISCOUNTED_CHECKS


def assert_agent(
    make_agent: Callable[[Any, int], Any], *, level: str = "quick", seed: int = 0
) -> VerificationReport:
    """Like :func:`verify_agent`, but raise ``AssertionError`` (with the report) on a failure.

    Returns the report when every check passed or was skipped.
    """
    report = verify_agent(make_agent, level=level, seed=seed)
    if not report.passed:
        raise AssertionError(f"the agent failed verification\n{report}")
    return report


def run_check(
    make_agent: Callable[[Any, int], Any], name: str, *, level: str = "quick", seed: int = 0
) -> CheckResult:
    """Run the protocol check, then the check called ``name``; return the latter's record.

    If the protocol check fails, the result for ``name`` is that failure
    (for ``name="protocol"``) or a skip. Used by the pytest helpers.
    """
    _validate("run_check", make_agent, level, seed)
    if name not in CHECK_NAMES:
        raise InvalidParameterError(
            f"run_check: unknown check {name!r}; choose one of {list(CHECK_NAMES)}."
        )
    protocol, ctx, _ = _prepare(make_agent, level, seed)
    if name == "protocol":
        return protocol
    if protocol.failed:
        return CheckResult(
            name, SKIPPED, f"not run: the protocol check failed ({protocol.message})"
        )
    if _skipped_for_average_reward(ctx, name):
        return CheckResult(name, SKIPPED, _AVERAGE_SKIP)
    check = CHECKS[CHECK_NAMES.index(name)]
    return check(ctx)
