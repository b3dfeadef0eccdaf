"""Gymnasium tasks whose agents carry an internal state of needs.

Importing this package registers every task under the ``needbench/`` namespace:

    import gymnasium as gym
    import needbench.envs
    env = gym.make("needbench/Menu-v0")
    vec = gym.make_vec("needbench/Menu-v0", num_envs=64, vectorization_mode="vector_entry_point")
"""

from gymnasium.envs.registration import register, registry

from needbench.envs.drives import AsymmetricDrive, HomeostaticDrive, QuadraticDrive, make_drive
from needbench.envs.errors import ActionError, ConfigError
from needbench.envs.needs import Coupling, Need
from needbench.envs.physiology import BodyState, Physiology
from needbench.envs.presets import preset
from needbench.envs.rewards import RewardChannel

#: The catalogue: (id, module, class prefix, keyword defaults of this version).
#: The env's own ``max_steps`` gives the time limit, so no TimeLimit wrapper is added.
TASKS: tuple[tuple[str, str, str, dict], ...] = (
    ("needbench/Menu-v0", "menu", "Menu", {}),
    ("needbench/Forage-v0", "forage", "Forage", {}),
    ("needbench/ForageWide-v0", "forage", "ForageWide", {}),
    ("needbench/Arena-v0", "arena", "Arena", {}),
    ("needbench/Forewarn-v0", "forewarn", "Forewarn", {}),
    ("needbench/Drift-v0", "drift", "Drift", {}),
    ("needbench/Gamble-v0", "gamble", "Gamble", {}),
    ("needbench/Lure-v1", "lure", "Lure", {}),
    ("needbench/Shift-v0", "shift", "Shift", {}),
)


def _register_all() -> None:
    for task_id, module, prefix, kwargs in TASKS:
        if task_id in registry:
            continue
        register(
            id=task_id,
            entry_point=f"needbench.envs.tasks.{module}:{prefix}Env",
            vector_entry_point=f"needbench.envs.tasks.{module}:{prefix}VectorEnv",
            kwargs=kwargs,
        )


_register_all()

TASK_IDS: tuple[str, ...] = tuple(task_id for task_id, *_ in TASKS)

__all__ = [
    "TASKS", "TASK_IDS", "ActionError", "AsymmetricDrive", "BodyState", "ConfigError",
    "Coupling", "HomeostaticDrive", "Need", "Physiology", "QuadraticDrive", "RewardChannel",
    "make_drive", "preset",
]
