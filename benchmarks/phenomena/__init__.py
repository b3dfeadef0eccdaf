"""The phenomena of homeostatic reinforcement learning, each measured on a run of its suite.

One module per phenomenon (``needbench.benchmarks.phenomena.<name>``), beside its
suite ``benchmarks/suites/phenomena/<name>.toml`` (built-in name
``phenomena/<name>``). A module defines:

    NAME: str            # the phenomenon's short name, e.g. "overconsumption"
    TITLE: str           # a line for tables, e.g. "Overconsumption of palatable food"
    TASK: str            # the task id it runs on
    SUITE: str           # the built-in suite, "phenomena/<name>"
    def measure(store: Store) -> Effect     # the effect on the runs of SUITE in a store
    def figure(store: Store, axes) -> None  # its figure on a matplotlib Axes (optional)

:class:`Effect` carries the measured effect, its 95 % bootstrap interval and the
expected direction against a threshold; ``met`` holds when the whole interval
lies on the expected side.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

from needbench.envs.errors import ConfigError


@dataclass(frozen=True)
class Effect:
    """A measured effect with its interval and the direction the phenomenon predicts.

    Attributes:
        name: the phenomenon (the module's ``NAME``).
        task: the task id it was measured on.
        quantity: what ``value`` is, in words and units (e.g. "excess above
            the set point at T = 1 minus at T = 0, band units").
        value: the effect on the observed runs.
        low, high: ends of its 95 % bootstrap interval.
        expected: the predicted side of ``threshold``: ``">"`` or ``"<"``.
        threshold: the value the effect is compared with (0 for a
            difference, 1 for a ratio).
        detail: figures behind the effect (per-seed values, per-condition
            means), for reports and figures; plain JSON values.
    """

    name: str
    task: str
    quantity: str
    value: float
    low: float
    high: float
    expected: str
    threshold: float = 0.0
    detail: dict[str, Any] = field(default_factory=dict)

    def __post_init__(self) -> None:
        if self.expected not in (">", "<"):
            raise ConfigError("expected", self.expected, "'>' or '<'")

    @property
    def met(self) -> bool:
        """Whether the whole interval lies on the expected side of the threshold."""
        if self.expected == ">":
            return self.low > self.threshold
        return self.high < self.threshold

    @property
    def expectation(self) -> str:
        """The expected direction as text, e.g. ``"> 0"``."""
        return f"{self.expected} {self.threshold:g}"
