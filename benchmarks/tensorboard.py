"""The harness's learning logger: scalars kept for the results store and written to TensorBoard.

One :class:`RunLogger` serves one job. Every ``log_scalar`` call is kept in
:attr:`RunLogger.curves` (the driver later writes them to the store's
``learning_curves`` table) and, when a writer is available, written as a
TensorBoard scalar event under :attr:`RunLogger.tensorboard_dir`.

The event-file writer, first available wins:

1. ``torch.utils.tensorboard.SummaryWriter``, when the job has already loaded
   torch (a deep agent);
2. ``tensorboard.summary.Writer``, TensorBoard's own writer (the ``deep`` extra
   installs tensorboard), which loads in half a second where torch takes
   several: NumPy agents never pay for torch;
3. ``torch.utils.tensorboard.SummaryWriter`` even when torch is not loaded yet;
4. none: scalars are still kept for the store, and :func:`writer_backend`
   returns None so that the command line can say that no event files are written.

One job writes one run: agents log only through this logger (deep agents
included: Stable-Baselines3 writes no event files of its own). The scalar
names are those of :mod:`needbench.agents.curves`; the logger's
:attr:`RunLogger.discount` is the suite's scoring discount, which agents use
for their stability curves.
"""

from __future__ import annotations

import functools
import importlib
import re
import sys
from collections.abc import Mapping
from pathlib import Path
from typing import Any

from needbench.agents.curves import DEFAULT_DISCOUNT, check_discount

#: Tags of the evaluation scalars, written once per job at the end of learning.
EVALUATION_PREFIX = "eval/"

#: What the evaluation scalars are read from: (tag, metric key of benchmarks.metrics.summarise).
EVALUATION_SCALARS = (
    ("return", "return"),
    ("discounted_drive", "discounted_drive"),
    ("time_in_band", "time_in_band"),
    ("survival", "survival"),
)

NO_WRITER_MESSAGE = ("no TensorBoard event files are written: install torch with tensorboard, "
                     "or tensorboard alone (pip install 'needbench[deep]')")


@functools.cache
def _importable(module: str) -> bool:
    try:
        importlib.import_module(module)
    except ImportError:
        return False
    return True


def writer_backend() -> str | None:
    """'torch', 'tensorboard' or None: the event-file writer a new logger would use now."""
    if "torch" in sys.modules and _importable("torch.utils.tensorboard"):
        return "torch"
    if _importable("tensorboard.summary"):
        return "tensorboard"
    if _importable("torch.utils.tensorboard"):
        return "torch"
    return None


def _open_writer(backend: str | None, directory: Path) -> Any:
    if backend == "torch":
        from torch.utils.tensorboard import SummaryWriter

        return SummaryWriter(log_dir=str(directory))
    if backend == "tensorboard":
        from tensorboard.summary import Writer

        return Writer(str(directory))
    return None


def run_folder_name(label: str, job_hash: str) -> str:
    """A folder name for one job's event files: its readable label plus 8 hash digits.

    Characters other than letters, digits and ``._=-`` become ``_`` (slashes
    in task ids would otherwise make nested folders); the hash digits keep
    names unique when two suites share a label.
    """
    safe = re.sub(r"[^A-Za-z0-9._=-]+", "_", label).strip("_")
    return f"{safe}.{job_hash[:8]}" if safe else job_hash[:8]


class RunLogger:
    """The logger handed to ``Agent.learn``: keeps curves and writes TensorBoard scalars.

    Args:
        tensorboard_dir: folder of this job's event files, or None to write none.
        discount: the suite's scoring discount, handed to the agent for its
            stability curves (:func:`needbench.agents.curves.scoring_discount`).

    Attributes:
        tensorboard_dir: the folder (a ``str``) or None; None too when no
            writer is installed.
        backend: 'torch', 'tensorboard' or None (see :func:`writer_backend`).
        curves: every logged point, (step, tag, value), in logging order.
    """

    def __init__(self, tensorboard_dir: str | Path | None, discount: float = DEFAULT_DISCOUNT):
        self.discount = check_discount("discount", discount)
        self.curves: list[tuple[int, str, float]] = []
        self.backend = writer_backend() if tensorboard_dir is not None else None
        self._writer = None
        self.tensorboard_dir: str | None = None
        if self.backend is not None:
            directory = Path(tensorboard_dir)
            directory.mkdir(parents=True, exist_ok=True)
            self._writer = _open_writer(self.backend, directory)
            self.tensorboard_dir = str(directory)

    def log_scalar(self, tag: str, value: float, step: int) -> None:
        """Keep the point for the store and write it as a TensorBoard scalar."""
        self.curves.append((int(step), str(tag), float(value)))
        self._write(tag, value, step)

    def log_evaluation(self, summary: Mapping[str, float], step: int) -> None:
        """Write the evaluation means (``benchmarks.metrics.summarise``) at ``step``.

        Tags: ``eval/return``, ``eval/discounted_drive``, ``eval/time_in_band``,
        ``eval/survival`` and ``eval/deviation/<need>`` (band units). They go to
        TensorBoard only: the store already holds them per episode.
        """
        for tag, key in EVALUATION_SCALARS:
            if key in summary:
                self._write(EVALUATION_PREFIX + tag, summary[key], step)
        for key, value in summary.items():
            if key.startswith("deviation/"):
                self._write(EVALUATION_PREFIX + key, value, step)

    def _write(self, tag: str, value: float, step: int) -> None:
        if self._writer is not None:
            self._writer.add_scalar(str(tag), float(value), int(step))

    def close(self) -> None:
        """Flush and close the event file (safe to call twice)."""
        if self._writer is not None:
            self._writer.flush()
            self._writer.close()
            self._writer = None

    def __enter__(self) -> RunLogger:
        return self

    def __exit__(self, *exc_info: object) -> None:
        self.close()
