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

Modules are found, not listed: :func:`phenomena` imports every module of this
package whose name does not start with ``_`` (``pkgutil.iter_modules``) and
checks that it keeps the contract above, so a new phenomenon is one module and
one suite file. The helpers its ``measure`` needs to read a store (runs grouped
by condition and seed, paired differences, rank correlations) are in
:mod:`needbench.benchmarks.phenomena._runs`.
"""

from __future__ import annotations

import importlib
import pkgutil
from dataclasses import dataclass, field
from types import ModuleType
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
        control: a control condition that must not show the effect, in words
            with its figures (e.g. the same agent without the cue); empty
            when the phenomenon has none.
        control_met: whether the control came out as predicted.
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
    control: str = ""
    control_met: bool = True

    def __post_init__(self) -> None:
        if self.expected not in (">", "<"):
            raise ConfigError("expected", self.expected, "'>' or '<'")

    @property
    def met(self) -> bool:
        """Whether the whole interval lies on the expected side of the threshold (and the
        control, if any, came out as predicted)."""
        if self.expected == ">":
            side = self.low > self.threshold
        else:
            side = self.high < self.threshold
        return side and self.control_met

    @property
    def expectation(self) -> str:
        """The expected direction as text, e.g. ``"> 0"``."""
        return f"{self.expected} {self.threshold:g}"

    @property
    def interval_text(self) -> str:
        """The effect and its interval, e.g. ``"+0.32 [+0.26, +0.39]"`` (3 significant digits)."""
        return f"{self.value:+.3g} [{self.low:+.3g}, {self.high:+.3g}]"

    def to_dict(self) -> dict[str, Any]:
        """Plain JSON values: every field, plus ``met`` and ``expectation``."""
        return {"name": self.name, "task": self.task, "quantity": self.quantity,
                "value": self.value, "low": self.low, "high": self.high,
                "expected": self.expected, "threshold": self.threshold,
                "expectation": self.expectation, "control": self.control,
                "control_met": self.control_met, "met": self.met, "detail": self.detail}


#: What every phenomenon module defines (``figure`` is optional).
CONTRACT = ("NAME", "TITLE", "TASK", "SUITE", "measure")


def _check_module(module: ModuleType) -> ModuleType:
    short = module.__name__.rsplit(".", 1)[-1]
    for attribute in CONTRACT:
        if not hasattr(module, attribute):
            raise ConfigError(f"{module.__name__}.{attribute}", "<missing>",
                              "a phenomenon module defining " + ", ".join(CONTRACT)
                              + " (see needbench.benchmarks.phenomena)")
    if module.NAME != short or module.SUITE != f"phenomena/{short}":
        raise ConfigError(f"{module.__name__}.NAME", (module.NAME, module.SUITE),
                          f"NAME {short!r} and SUITE 'phenomena/{short}', after the module")
    return module


def phenomena() -> dict[str, ModuleType]:
    """Every phenomenon module of this package, by ``NAME``, in name order."""
    found = {}
    for info in sorted(pkgutil.iter_modules(__path__), key=lambda info: info.name):
        if info.name.startswith("_") or info.ispkg:
            continue
        module = _check_module(importlib.import_module(f"{__name__}.{info.name}"))
        found[module.NAME] = module
    return found


def phenomenon(name: str) -> ModuleType:
    """The module of one phenomenon, by its ``NAME``."""
    found = phenomena()
    if name not in found:
        raise ConfigError("phenomenon", name, "one of " + ", ".join(found))
    return found[name]


def suite_name(suite: str | ModuleType) -> str:
    """The ``[suite] name`` of a built-in suite (``"phenomena/tradeoff"``) or of a
    phenomenon module's ``SUITE``: the name its runs carry in a store."""
    from needbench.benchmarks.cli import resolve_suite
    from needbench.benchmarks.spec import parse_suite

    builtin = suite if isinstance(suite, str) else suite.SUITE
    return parse_suite(resolve_suite(builtin)).name


def in_store(store: Any) -> list[ModuleType]:
    """The phenomena with at least one run of their suite in ``store``."""
    suites = {run["suite"] for run in store.runs()}
    return [module for module in phenomena().values() if suite_name(module) in suites]


#: The file ``needbench run phenomena`` writes beside the phenomena's folders.
EFFECTS_FILE = "effects.json"


@dataclass(frozen=True)
class Measurement:
    """A phenomenon measured on a store: its effect, or why it could not be measured."""

    module: ModuleType
    effect: Effect | None
    problem: str | None = None

    @property
    def met(self) -> bool:
        return self.effect is not None and self.effect.met

    def row(self) -> tuple[str, str, str, str, str]:
        """(phenomenon, task, measured effect [95 % interval], expected direction, met)."""
        task = self.module.TASK.removeprefix("needbench/")
        if self.effect is None:
            return (self.module.TITLE, task, f"not measured: {self.problem}", "", "no")
        effect = self.effect
        text = f"{effect.interval_text} ({effect.quantity})"
        if effect.control:
            text += f"; control: {effect.control}"
        return (self.module.TITLE, task, text, effect.expectation,
                "yes" if effect.met else "no")


def measure(module: ModuleType, store: Any) -> Measurement:
    """``module.measure(store)``, or the ConfigError that says what the store lacks."""
    try:
        return Measurement(module, module.measure(store))
    except ConfigError as error:
        return Measurement(module, None, str(error))


ROW_HEADER = ("phenomenon", "task", "measured effect [95 % interval]", "expected", "met")


def format_effects(measured: list[Measurement]) -> str:
    """The phenomena table as aligned text, one line per phenomenon."""
    rows = [ROW_HEADER] + [m.row() for m in measured]
    widths = [max(len(row[i]) for row in rows) for i in range(len(ROW_HEADER) - 1)]
    lines = []
    for index, row in enumerate(rows):
        cells = [text.ljust(width) for text, width in zip(row, widths, strict=False)]
        lines.append("  ".join(cells + [row[-1]]).rstrip())
        if index == 0:
            lines.append("  ".join("-" * len(text) for text in cells + [row[-1]]))
    return "\n".join(lines)


def effects_json(measured: list[Measurement]) -> str:
    import json

    return json.dumps([{"phenomenon": m.module.NAME, "suite": m.module.SUITE,
                        "effect": None if m.effect is None else m.effect.to_dict(),
                        "problem": m.problem, "met": m.met} for m in measured], indent=2)
