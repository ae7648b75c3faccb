"""Public names of an analysis family, loaded from their module on first use (PEP 562 module ``__getattr__``).

A family's ``__init__`` lists which module holds each public name instead of importing them all, so that
``from assistant.analysis.lift_series import analyse_series`` loads the modules that function needs and not,
say, the scipy modules of a sibling it never calls. Importing a module is a one-time cost of 0.1-0.5 s per
scipy subpackage on a slow machine, which is most of a short command's run.
"""

from __future__ import annotations

import importlib
from collections.abc import Callable, Mapping


def attach(package: str, where: Mapping[str, tuple[str, ...]]) -> tuple[Callable, Callable]:
    """``(__getattr__, __dir__)`` for ``package``; ``where`` maps a submodule to the names it exports."""
    owner = {name: module for module, names in where.items() for name in names}
    namespace = importlib.import_module(package).__dict__

    def __getattr__(name: str):
        module = owner.get(name)
        if module is None:
            raise AttributeError(f"module {package!r} has no attribute {name!r}")
        value = getattr(importlib.import_module(f"{package}.{module}"), name)
        namespace[name] = value  # found once, kept: later look-ups do not come here
        return value

    def __dir__() -> list[str]:
        return sorted(set(namespace) | set(owner))

    return __getattr__, __dir__
