"""Average-reward solvers respect a model's action masks (as the discounted ones do)."""

from __future__ import annotations

import numpy as np
import pytest

import tdkit


def _two_state(masks=None):
    # In state 0, action 0 stays and pays 1; action 1 pays 3 and moves to state 1,
    # which pays nothing and returns: gain 1.5 by alternating, 1 by staying.
    P = np.zeros((2, 2, 2))
    P[0, 0, 0] = P[0, 1, 1] = P[1, :, 0] = 1.0
    R = np.array([[1.0, 3.0], [0.0, 0.0]])
    return tdkit.FiniteMDP(P, R, gamma=0.9, masks=masks)


def test_a_masked_action_never_enters_the_relative_value_iteration_max():
    free = tdkit.relative_value_iteration(_two_state())
    assert round(free.gain, 9) == 1.5
    masked = tdkit.relative_value_iteration(
        _two_state(np.array([[True, False], [True, True]]))
    )
    assert round(masked.gain, 9) == 1.0  # staying is all that is left
    assert masked.policy[0] == 0
    # relative value iteration stops with the gain exact to within tol / 2 = 5e-10
    assert abs(masked.gain - tdkit.policy_gain(_two_state(), [0, 0])) <= 5e-10


def test_policy_gain_refuses_a_policy_that_takes_a_masked_action():
    mdp = _two_state(np.array([[True, False], [True, True]]))
    with pytest.raises(ValueError, match="masks that action"):
        tdkit.policy_gain(mdp, [1, 0])
