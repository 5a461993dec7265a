r"""K independent tabular learners stepping in lockstep on one :class:`~tdkit.FiniteMDP`.

:func:`train_batch` runs ``n_learners`` (K) copies of a one-step TD control
learner -- Q-learning, SARSA, Expected SARSA or Double Q-learning -- on the
same finite model at once. Each learner has its own table, visit counts,
current state, episode return and episode step count. Two paths run it and
give the same result for the same seed:

* **compiled** (when numba is installed: ``pip install tdkit[fast]``): one
  kernel steps every learner in machine code, about ten million
  learner-steps per second per core from K = 1 on (``docs/performance.md``);
* **numpy**: one time step of all K learners is a handful of numpy
  operations over a leading axis of length K, with no Python loop over the
  learners.

Semantics (identical to the scalar learners of :mod:`tdkit.learners.one_step`
trained by :func:`tdkit.train` on ``mdp.to_env()``):

* Episodes start from a state drawn from ``mdp.initial``, end on entering a
  terminal state (``terminated``: the target does not bootstrap) or after
  ``max_episode_steps`` steps (``truncated``: the target bootstraps), and
  then restart.
* Next states are sampled from the model's successor form with one uniform
  number per learner (:mod:`tdkit.envs._successors`, the rule ``to_env``
  samples with); the reward is the per-outcome reward when the model has one,
  else the expected reward ``R[s, a]``.
* Behaviour is ε-greedy or soft-max over the allowed actions; greedy choices
  break ties uniformly at random (tie :math:`\lfloor u k \rfloor` of the
  :math:`k` tied actions, the rule of :func:`tdkit._greedy.greedy_action`).
  The bootstrap values are those of :mod:`tdkit.learners._targets`.
* At step :math:`t` (from 0) the behaviour uses :math:`\varepsilon(t)` (or
  :math:`\tau(t)`) and the update uses :math:`\alpha(t + 1, n(s, a))`, where
  :math:`n(s, a)` counts the updates of the pair including this one; SARSA's
  next action and Expected SARSA's expectation use :math:`\varepsilon(t + 1)`
  (a scalar learner has observed :math:`t + 1` transitions by then).
* SARSA draws :math:`A_{t+1}` before its update and then takes it; on
  truncation the bootstrap action is drawn but the next episode starts with a
  fresh action. Double Q-learning flips one fair coin per learner and step,
  behaves on :math:`Q^A + Q^B` and reports :math:`(Q^A + Q^B)/2`.
* Action masks ``(S, A)`` (``masks=``, or the model's own) restrict every
  choice, max and expectation to the allowed actions.

UCB exploration is not vectorised; train the scalar learners with
:func:`tdkit.train` for it.

Examples
--------
>>> from tdkit.batch import train_batch
>>> from tdkit.envs.problems import garnet
>>> mdp = garnet(10, 2, 3, gamma=0.5, seed=0)
>>> res = train_batch(mdp, "q_learning", n_learners=4, steps=200, max_episode_steps=20)
>>> res.tables.shape, res.n_learners, int(res.visits.sum())
((4, 10, 2), 4, 800)
>>> [len(r) for r in res.episode_returns]        # 200 steps, episodes of 20
[10, 10, 10, 10]
"""

from __future__ import annotations

from ._result import BatchResult
from ._setup import LEARNERS
from ._train import BACKENDS, compiled_available, train_batch

__all__ = ["BACKENDS", "LEARNERS", "BatchResult", "compiled_available", "train_batch"]
