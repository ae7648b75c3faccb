"""Errors of the media family: an image that cannot be analysed, and bits too short for the pixel size."""

from __future__ import annotations

from assistant.errors import InputError

__all__ = ["MediaInputError", "TooFewPixelsPerBitError"]


class MediaInputError(InputError):
    """The image cannot be analysed (shape, pixel size, orientation name)."""


class TooFewPixelsPerBitError(MediaInputError):
    """Bits shorter than the resolvable minimum of pixels; ``needed_pixel_m`` is the largest pixel that works."""

    def __init__(self, message: str, *, needed_pixel_m: float, bit_length_m: float):
        super().__init__(message)
        self.needed_pixel_m = needed_pixel_m
        self.bit_length_m = bit_length_m
