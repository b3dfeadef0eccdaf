"""Baseline agents for needbench tasks.

Importing this package is cheap: agents are imported when first asked for by
name (``AGENTS["ppo"]`` imports torch and Stable-Baselines3, nothing before).
"""

from needbench.agents.base import Agent, Logger, NullLogger
from needbench.agents.registry import AGENTS, make_agent, register_agent

__all__ = ["AGENTS", "Agent", "Logger", "NullLogger", "make_agent", "register_agent"]
