"""One error root for the assistant, each error also carrying its built-in meaning, and the one table that turns
errors into exit codes."""

from __future__ import annotations

import importlib
import pkgutil
import sys

import pytest

import assistant
from assistant.errors import AssistantError


def _assistant_exception_classes() -> set[type]:
    for m in pkgutil.walk_packages(assistant.__path__, "assistant."):
        if not m.name.endswith("__main__"):  # that one runs the command line
            importlib.import_module(m.name)
    return {obj for name, mod in list(sys.modules.items()) if name.startswith("assistant") and mod is not None
            for obj in vars(mod).values()
            if isinstance(obj, type) and issubclass(obj, BaseException) and obj.__module__.startswith("assistant")}


def test_every_error_of_the_assistant_has_the_one_root_and_a_builtin_meaning():
    from assistant.procedures.events import Cancelled

    classes = _assistant_exception_classes()
    assert len(classes) > 20  # the check sees them all (analysis, storage, procedures, CLI, TUI)
    for cls in classes:
        assert issubclass(cls, AssistantError), cls
        meaning = [b for b in cls.__mro__ if b.__module__ == "builtins" and b not in (BaseException, Exception, object)]
        assert meaning or cls in (AssistantError, Cancelled), cls  # a cancel means only itself


@pytest.mark.parametrize("exc, code", [
    ("assistant.cli._common:UsageError", 2), ("assistant.storage:NotASessionFileError", 2),
    ("assistant.storage:SessionWriteError", 1), ("assistant.procedures.guard:SafetyError", 1),
    ("assistant.analysis.lift_series:SeriesInputError", 2), ("assistant.procedures.events:Cancelled", 1),
    ("assistant.analysis.field_series:LoopInputError", 2), ("assistant.procedures.field_series:MagnetFault", 1),
    ("drivers.errors:BadURL", 2), ("drivers.errors:LimitExceeded", 2), ("drivers.errors:InsecureBind", 2),
    ("drivers.errors:KeyFileError", 2), ("drivers.errors:LinkLost", 1), ("drivers.errors:ProtocolError", 1),
    ("drivers.fault_plan:FaultPlanError", 2), ("builtins:FileNotFoundError", 2), ("builtins:RuntimeError", 1),
    ("builtins:KeyboardInterrupt", 130), ("builtins:BrokenPipeError", 1),
])
def test_exit_codes_come_from_one_table(exc, code):
    from assistant.cli._common import exit_code

    module, _, name = exc.partition(":")
    cls = getattr(importlib.import_module(module), name)
    instance = cls("bias", 5.0, -1.0, 1.0, "V") if name == "LimitExceeded" else cls("x")
    assert exit_code(instance) == code
