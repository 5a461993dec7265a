"""The promises every control learner keeps, checked on every learner in tdkit.learners.

Design contract (shared/DESIGN.md): greedy ties broken uniformly at random,
masked actions never chosen, a time limit is not a terminal state, the
protocol and table shape, validation at construction.
"""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats

import tdkit
from tdkit import learners

PREDICTION = {"TD0", "TDLambda", "DifferentialTD"}
CONTROL = [getattr(learners, name) for name in learners.__all__ if name not in PREDICTION]
# Average-reward learners take no gamma; their own contract is in
# tests/unit/learners/test_differential.py.
DISCOUNTED = [cls for cls in CONTROL if not cls.__name__.startswith("Differential")]


@pytest.mark.parametrize("cls", CONTROL)
def test_protocol_and_table_shape(cls):
    agent = cls(4, 3, seed=0)
    assert isinstance(agent, tdkit.Agent)
    assert agent.table.shape == (4, 3)
    assert not agent.table.flags.writeable
    assert agent.update() == ()
    assert agent.q_values(2).shape == (3,)


@pytest.mark.parametrize("cls", CONTROL)
def test_greedy_ties_are_uniform(cls):
    # All four actions tie. Counts of 20,000 greedy picks must fit the uniform
    # distribution: chi-square with 3 degrees of freedom at the 1 - 1e-6 quantile
    # (a correct learner fails with probability 1e-6; the seed is fixed anyway).
    # "First index wins" would give all 20,000 to action 0: chi-square = 60,000.
    agent = cls(1, 4, seed=7)
    n = 20_000
    counts = np.bincount([agent.act(0, explore=False) for _ in range(n)], minlength=4)
    chi2 = ((counts - n / 4) ** 2 / (n / 4)).sum()
    assert chi2 < stats.chi2.ppf(1 - 1e-6, df=3)


@pytest.mark.parametrize("cls", CONTROL)
@settings(max_examples=20)
@given(seed=st.integers(0, 2**16), data=st.data())
def test_masked_actions_are_never_chosen(cls, seed, data):
    n_actions = data.draw(st.integers(1, 6))
    mask = np.array(data.draw(st.lists(st.booleans(), min_size=n_actions, max_size=n_actions)))
    if not mask.any():
        mask[0] = True
    agent = cls(2, n_actions, exploration=0.5, seed=seed, initial_value=(-1.0, 1.0))
    for _ in range(20):
        a = agent.act(0, mask=mask)
        assert mask[a]
        agent.observe(0, a, float(data.draw(st.floats(-1, 1))), 0, False, False, next_mask=mask)
        agent.update()
        assert mask[agent.act(0, mask=mask, explore=False)]


@pytest.mark.parametrize("cls", DISCOUNTED)
def test_time_limit_is_not_a_terminal_state_in_training(cls):
    """A one-state continuing task cut every step by a time limit.

    Reward 1 forever, gamma 0.9: the true value is 1 / (1 - 0.9) = 10
    (geometric series). A learner that treats the time limit as terminal
    learns 1 instead, so the two cases are far apart.
    """

    class Forever:
        def reset(self, seed=None):
            return 0, {}

        def step(self, action):
            return 0, 1.0, False, False, {}

    agent = cls(1, 1, gamma=0.9, step_size=0.5, exploration=0.0, seed=0)
    tdkit.train(agent, Forever(), episodes=400, max_episode_steps=1, seed=0)
    # Each update contracts the error by (1 - alpha (1 - gamma)) = 0.95 (0.975 per update of
    # one Double-Q table, ~200 each; planning learners only add more such updates):
    # error after 400 real updates <= 10 * 0.95**200 < 1e-3.
    assert agent.table[0, 0] == pytest.approx(10.0, abs=1e-2)


@pytest.mark.parametrize("cls", DISCOUNTED)
@pytest.mark.parametrize(
    ("kwargs", "name"),
    [
        ({"gamma": 1.5}, "gamma"),
        ({"step_size": 0.0}, "step_size"),
        ({"step_size": 1.5}, "step_size"),
        ({"exploration": 1.1}, "exploration"),
        ({"initial_value": float("nan")}, "initial_value"),
        ({"seed": -3}, "seed"),
    ],
)
def test_shared_hyper_parameters_are_validated(cls, kwargs, name):
    with pytest.raises(ValueError, match=name):
        cls(3, 2, **kwargs)


# ------------------------------------------------------------ signatures and parameters
ALL = [getattr(learners, name) for name in learners.__all__]
SHARED = ["step_size", "initial_value", "seed", "state_encoder", "action_encoder"]
ACTING_WITH_A_POLICY = {"TD0", "TDLambda", "DifferentialTD"}


def _required(cls):
    return {"policy": np.full((4, 3), 1.0 / 3)} if cls.__name__ in ACTING_WITH_A_POLICY else {}


@pytest.mark.parametrize("cls", ALL)
def test_signature_shows_every_keyword_and_get_params_follows_it(cls):
    import inspect

    params = inspect.signature(cls).parameters
    assert not any(p.kind in (p.VAR_KEYWORD, p.VAR_POSITIONAL) for p in params.values())
    assert list(params)[:2] == ["n_states", "n_actions"]
    assert set(SHARED) <= set(params)
    assert ("gamma" in params) == (not cls.__name__.startswith("Differential"))  # no discount
    assert ("exploration" in params) == (cls.__name__ not in ACTING_WITH_A_POLICY)
    agent = cls(4, 3, seed=0, **_required(cls))
    got = agent.get_params()
    assert list(got) == list(params)
    rebuilt = cls(**got)  # get_params is a complete set of constructor arguments
    assert rebuilt.get_params().keys() == got.keys()
    assert repr(agent).startswith(f"{cls.__name__}(n_states=4, n_actions=3, ")
    assert "seed=0" in repr(agent) and "state_encoder" not in repr(agent)  # None is left out


@pytest.mark.parametrize(
    ("cls", "kwargs", "suggested"),
    [
        (tdkit.QLearning, {"alpha": 0.5}, "step_size=0.5"),
        (tdkit.Sarsa, {"epsilon": 0.2}, "exploration=0.2"),
        (tdkit.NStepSarsa, {"n_steps": 3}, "n=3"),
        (tdkit.SarsaLambda, {"lamda": 0.5}, "lam=0.5"),  # a typo: nearest name by difflib
        (tdkit.DynaQ, {"planing_steps": 3}, "planning_steps=3"),
        (tdkit.ExpectedSarsa, {"discount": 0.9}, "gamma=0.9"),
    ],
)
def test_unknown_keywords_name_the_nearest_valid_one(cls, kwargs, suggested):
    with pytest.raises(TypeError, match=suggested) as info:
        cls(16, 4, **kwargs)
    assert isinstance(info.value, tdkit.InvalidParameterError)
    assert cls.__name__ in str(info.value)


@pytest.mark.parametrize("cls", [learners.TD0, learners.TDLambda])
def test_prediction_learners_explain_that_they_do_not_explore(cls):
    with pytest.raises(tdkit.InvalidParameterError, match=r"do not explore.*policy"):
        cls(3, 2, policy=np.full((3, 2), 0.5), exploration=0.3)


@pytest.mark.parametrize("cls", ALL)
def test_class_docstrings_are_literal(cls):
    # A docstring assembled with "+" is invisible to tools that read the source
    # (ast.get_docstring returns None for a "__doc__ = ... + ..." assignment).
    import ast
    import inspect

    tree = ast.parse(inspect.getsource(inspect.getmodule(cls)))
    (node,) = [n for n in tree.body if isinstance(n, ast.ClassDef) and n.name == cls.__name__]
    doc = ast.get_docstring(node)
    assert doc is not None and "References" in doc and "Parameters" in doc
