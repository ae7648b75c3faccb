"""The one exception root of the assistant.

Every error the assistant raises on purpose derives from :class:`AssistantError` and also from the built-in
exception that carries the same meaning, so that code which knows only Python's own exceptions still catches
it sensibly: bad input is a ``ValueError``, a step asked for in the wrong order a ``RuntimeError``, a failed
write an ``OSError``. The command line turns the built-in meaning into an exit code (``assistant.cli._common``).
The classes live beside the code that raises them; this module imports nothing, so every layer may use it.
"""


class AssistantError(Exception):
    """Root of every error the assistant raises on purpose."""


class InputError(AssistantError, ValueError):
    """A value given to a function that it cannot use: the message names the quantity, the value and the limit.
    Each package has more specific errors; this one is for checking arguments."""


__all__ = ["AssistantError", "InputError"]
