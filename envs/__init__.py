"""Gymnasium tasks whose agents carry an internal state of needs."""

from needbench.envs.drives import AsymmetricDrive, HomeostaticDrive, QuadraticDrive, make_drive
from needbench.envs.errors import ActionError, ConfigError
from needbench.envs.needs import Coupling, Need
from needbench.envs.physiology import BodyState, Physiology
from needbench.envs.presets import preset
from needbench.envs.rewards import RewardChannel

__all__ = [
    "ActionError", "AsymmetricDrive", "BodyState", "ConfigError", "Coupling",
    "HomeostaticDrive", "Need", "Physiology", "QuadraticDrive", "RewardChannel",
    "make_drive", "preset",
]
