"""``ppo``, ``a2c``, ``dqn``, ``sac``: thin adapters over Stable-Baselines3.

Each agent wraps one SB3 algorithm behind the needbench agent protocol. SB3 and
torch are imported only when a deep agent is built, so the registry and every
NumPy agent work without the ``deep`` extra; building a deep agent without
Stable-Baselines3 raises :class:`~needbench.envs.errors.ConfigError` saying
what to install.

The package, by role: :mod:`.hyperparameters` (one dataclass per algorithm,
the task-kind defaults and the one table from a dataclass to SB3's keywords),
:mod:`.vec_env` (the one bridge from a Gymnasium vector env to SB3's VecEnv,
and SB3's logger pointed at ours), :mod:`.normalisation` (VecNormalize's
statistics) and :mod:`.agents` (the agent classes).

Environments
------------
A deep agent learns on a vector env that autoresets in Gymnasium's same-step
mode, the mode SB3's own vector envs follow: the task's native vector env made
by :func:`needbench.agents.base.learning_env` (with
``autoreset_mode=AutoresetMode.SAME_STEP`` and ``learning_copies`` copies:
``n_envs``, or the task kind's number), or a single env, which becomes one
copy in Gymnasium's ``SyncVectorEnv``. :func:`.vec_env.stable_vec_env` hands
it to SB3 through its public ``reset`` and ``step`` alone. Copy j of a run
with seed s is first reset with seed s + j (Gymnasium's convention, see
:mod:`needbench.agents.base`), later from its own stream; torch, NumPy and the
action space are seeded with s by SB3. Every ``learn`` call starts fresh
episodes this way; a second call continues training the same model (with the
same number of copies). Each worker sets torch to ``torch_threads`` intra-op
threads (1 by default).

Normalisation
-------------
With ``normalise_observations`` and/or ``normalise_rewards`` the copies are
wrapped in SB3's ``VecNormalize`` (:mod:`.normalisation`). Drive-reduction
rewards are small differences of drive, and the source offsets of a grid task
are fractions of the grid, so both matter on Forage. The running statistics
carry over to a second ``learn`` call, are saved with the agent, and ``act``
scales observations with them. Logged returns are the env's own rewards.

Logging
-------
At each episode's end the adapter logs, through the needbench logger, the
scalars of :mod:`needbench.agents.curves` (``episode/return``,
``episode/length``, ``stability/discounted_drive`` with the logger's scoring
discount, ``stability/time_in_band``, ``stability/deviation/<need>``), the same
names and definitions as every other agent's. SB3's optimiser figures
(``train/<name>`` inside SB3) reach the same logger as ``update/<name>`` at
SB3's logging intervals (the ``n_updates`` counter is dropped); SB3 writes no
event files or other records of its own, so a job has one TensorBoard run.

Saving
------
The agent file of :mod:`needbench.agents.base`; the SB3 model (``model.save``
zip, without the env) is kept as the byte array ``state/sb3_model``, the
hyperparameters the model was built with (``None`` fields filled) in the
header's state, and the normalisation statistics as the arrays
``state/normalisation/<statistic>`` (``observation_mean``,
``observation_variance``, ``observation_count``, and ``return_...`` the
same; per key, ``.../<key>``, for dict observations).
"""

from needbench.agents.deep.agents import (
    A2CAgent,
    DeepAgent,
    DQNAgent,
    PPOAgent,
    SACAgent,
    import_stable_baselines3,
)
from needbench.agents.deep.hyperparameters import (
    KIND_DEFAULTS,
    A2CHyperparameters,
    DQNHyperparameters,
    PPOHyperparameters,
    SACHyperparameters,
    algorithm_arguments,
    resolve_hyperparameters,
    task_kind,
)
from needbench.agents.deep.normalisation import Normalisation
from needbench.agents.deep.vec_env import per_copy_infos, stable_vec_env

__all__ = [
    "KIND_DEFAULTS", "A2CAgent", "A2CHyperparameters", "DQNAgent", "DQNHyperparameters",
    "DeepAgent", "Normalisation", "PPOAgent", "PPOHyperparameters", "SACAgent",
    "SACHyperparameters", "algorithm_arguments", "import_stable_baselines3", "per_copy_infos",
    "resolve_hyperparameters", "stable_vec_env", "task_kind",
]
