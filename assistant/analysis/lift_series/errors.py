"""Input errors of the lift-series analysis; each is a ``ValueError`` under the assistant's error root."""

from __future__ import annotations

from assistant.errors import AssistantError

__all__ = ["SeriesInputError", "TooFewHeightsError", "HeightsMismatchError", "HeightsNotIncreasingError",
           "ImageShapeError", "TooFewBiasesError", "TooManyInvalidPixelsError"]


class SeriesInputError(AssistantError, ValueError):
    """Root of the input errors of a lift-series analysis: a stack, a setting or a stored series that cannot be
    analysed (the message names the quantity and the limit)."""


class TooFewHeightsError(SeriesInputError):
    """Fewer than three lift heights."""


class HeightsMismatchError(SeriesInputError):
    """The number of heights differs from the stack."""


class HeightsNotIncreasingError(SeriesInputError):
    """Heights not strictly increasing."""


class ImageShapeError(SeriesInputError):
    """Images of different shapes, or a stack of the wrong dimensionality."""


class TooFewBiasesError(SeriesInputError):
    """A bias grid with fewer than three biases, or biases not matching the stack."""


class TooManyInvalidPixelsError(SeriesInputError):
    """More NaN pixels than the limit."""
