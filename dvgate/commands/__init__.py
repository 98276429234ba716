"""Subcommands of the ``dvgate`` command line, one module each.

Each module exposes ``register(subparsers)``, which adds its parser and sets ``func``
to a callable taking the parsed arguments and returning an exit status, and an integer
``ORDER`` that places it in ``--help``. Modules are found by listing this package, so a
new command is a new file and nothing else.
"""

from __future__ import annotations

import importlib
import pkgutil
from types import ModuleType


def command_modules() -> list[ModuleType]:
    """Every subcommand module, in ``ORDER``."""
    modules = [
        importlib.import_module(f"{__name__}.{info.name}")
        for info in pkgutil.iter_modules(__path__)
        if not info.name.startswith("_")
    ]
    return sorted(modules, key=lambda module: (getattr(module, "ORDER", 100), module.__name__))
