"""Names that import a user's own code: ``module:attribute`` agents and ``module:EnvId`` tasks.

A suite names agents and tasks from registries (the built-in agents, the
installed plug-ins of the ``needbench.agents`` entry point group, the
``needbench/`` tasks), so reading a suite file runs no code of its own. Two
forms name code outside the registries:

* an agent ``module:attribute``: the class ``attribute`` (dots allowed) of a
  module importable from ``sys.path`` (the command line adds the current
  folder when ``--allow-import`` is given);
* a task ``module:EnvId``: Gymnasium's own form, where ``gymnasium.make``
  imports ``module`` (which registers ``EnvId``) before making the env.

Both import the module, which runs whatever code it holds, so both are
refused unless the caller allows imports: ``--allow-import`` on the command
line, ``allow_import=True`` in Python. The refusal is a
:class:`ImportNotAllowed` (a ConfigError), exit code 2 at the command line.
"""

from __future__ import annotations

import importlib
import re
import sys
from pathlib import Path
from types import ModuleType
from typing import Any

from needbench.envs.errors import ConfigError

#: ``module:attribute`` with dotted Python names on both sides.
_IMPORT_FORM = re.compile(r"^[A-Za-z_]\w*(?:\.[A-Za-z_]\w*)*:[^:\s]+$")
_ATTRIBUTE = re.compile(r"^[A-Za-z_]\w*(?:\.[A-Za-z_]\w*)*$")


def is_import_form(name: Any) -> bool:
    """Whether ``name`` is a string with a ``module:`` prefix (the form that imports code)."""
    return isinstance(name, str) and ":" in name


def split_import_form(path: str, name: str, *, attribute: bool) -> tuple[str, str]:
    """(module, rest) of ``module:rest``; ConfigError for a malformed name.

    ``attribute``: the rest must be a dotted Python name (an agent class);
    otherwise any Gymnasium id (a task).
    """
    what = "'module:Class'" if attribute else "'module:EnvId'"
    if not _IMPORT_FORM.match(name):
        raise ConfigError(path, name, f"{what}, a dotted module name and what it holds, "
                          "with one colon")
    module_name, _, rest = name.partition(":")
    if attribute and not _ATTRIBUTE.match(rest):
        raise ConfigError(path, name, f"{what}: {rest!r} is not a Python name")
    return module_name, rest


class ImportNotAllowed(ConfigError):
    """A ``module:`` name was given without permission to import (``--allow-import``)."""

    def __init__(self, path: str, name: str, what: str, *, context: str | None = None):
        module_name = name.partition(":")[0]
        super().__init__(path, name, f"a registered {what} (see `needbench list`). "
                         f"{name!r} would import the module {module_name!r} and run its code; "
                         "give --allow-import (Python: allow_import=True) to allow that",
                         context=context)


def require_import_allowed(path: str, name: str, what: str, allow_import: bool,
                           *, context: str | None = None) -> None:
    """ImportNotAllowed unless ``allow_import`` (for a ``module:`` name)."""
    if not allow_import:
        raise ImportNotAllowed(path, name, what, context=context)


def import_user_module(path: str, name: str, module_name: str) -> ModuleType:
    """Import a user's module; any failure is a ConfigError naming it (no traceback)."""
    try:
        return importlib.import_module(module_name)
    except ModuleNotFoundError as error:
        if error.name is not None and module_name.startswith(error.name):
            raise ConfigError(path, name, f"a module importable from the current folder or "
                              f"PYTHONPATH (no module named {error.name!r})") from None
        raise ConfigError(path, name, f"a module that imports ({type(error).__name__}: "
                          f"{error})") from None
    except Exception as error:  # the user's module raised while it was imported
        raise ConfigError(path, name, f"a module that imports without error "
                          f"({type(error).__name__}: {error})") from None


def resolve_attribute(path: str, name: str, module: ModuleType, attribute: str) -> Any:
    """``module.attribute`` (dots followed), or ConfigError naming what is missing."""
    target: Any = module
    for part in attribute.split("."):
        if not hasattr(target, part):
            raise ConfigError(path, name, f"an attribute of module {module.__name__!r} "
                              f"({part!r} is not there)")
        target = getattr(target, part)
    return target


def module_root(module_name: str) -> str | None:
    """The ``sys.path`` folder a module was imported from (for worker processes), if any."""
    top = sys.modules.get(module_name.partition(".")[0])
    location = getattr(top, "__file__", None)
    if location is None:
        return None
    file = Path(location).resolve()
    # A package's __init__.py sits one folder deeper than a plain module.
    root = file.parent.parent if file.name == "__init__.py" else file.parent
    return str(root)


def add_import_paths(paths: tuple[str, ...] | list[str]) -> bool:
    """Append folders to ``sys.path`` (after what is there); True if any was new."""
    added = False
    for folder in paths:
        if folder not in sys.path:
            sys.path.append(folder)
            added = True
    if added:
        importlib.invalidate_caches()
    return added
