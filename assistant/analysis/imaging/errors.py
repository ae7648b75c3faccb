"""Input errors of the imaging analysis; a ``ValueError`` under the assistant's error root."""

from __future__ import annotations

from assistant.errors import InputError

__all__ = ["ImagingInputError"]


class ImagingInputError(InputError):
    """The stack cannot be analysed (shape, heights, biases); the message names the problem."""
