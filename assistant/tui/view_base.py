"""What every view shares: event hooks, a redraw that runs at most a few times a second, and field parsing."""

from __future__ import annotations

import math

from textual.containers import Container
from textual.widgets import Input

from assistant.errors import AssistantError


class FieldError(AssistantError, ValueError):
    """A form field holds something that is not the number asked for."""


class View(Container):
    """A view receives procedure events and step results from the app and redraws on a timer when dirty.

    Events can come hundreds of times a second from a fast simulated stage; keeping the data and drawing it
    at most every ``REDRAW_S`` keeps the UI thread free.
    """

    REDRAW_S = 0.15
    #: Progress ``what`` values this view wants (see assistant.procedures).
    EVENTS: tuple[str, ...] = ()

    def on_mount(self) -> None:
        self._dirty = False
        self.set_interval(self.REDRAW_S, self._maybe_redraw)

    def mark_dirty(self) -> None:
        self._dirty = True

    def _maybe_redraw(self) -> None:
        if getattr(self, "_dirty", False):
            self._dirty = False
            self.redraw()

    # hooks -------------------------------------------------------------------------------------------
    def progress(self, event) -> None:
        """A Progress event whose ``what`` is in :attr:`EVENTS`."""

    def step_finished(self, step: str, result, error) -> None:
        """A workflow step ended (any step; views pick what they show)."""

    def redraw(self) -> None:
        """Draw the stored data (called on the UI thread, at most every REDRAW_S)."""

    # fields ------------------------------------------------------------------------------------------
    def text(self, input_id: str) -> str:
        return self.query_one(f"#{input_id}", Input).value.strip()

    def number(self, input_id: str, label: str, *, optional: bool = False, integer: bool = False,
               positive: bool = True) -> float | int | None:
        raw = self.text(input_id)
        if not raw:
            if optional:
                return None
            raise FieldError(f"{label}: a value is needed")
        try:
            value = int(raw) if integer else float(raw)
        except ValueError:
            raise FieldError(f"{label}: {raw!r} is not {'a whole number' if integer else 'a number'}") from None
        if not math.isfinite(value) or (positive and value <= 0):
            raise FieldError(f"{label}: {raw} must be {'positive' if positive else 'finite'}")
        return value

    def numbers(self, input_id: str, label: str, *, optional: bool = False) -> tuple[float, ...] | None:
        raw = self.text(input_id)
        if not raw:
            if optional:
                return None
            raise FieldError(f"{label}: at least one value is needed")
        try:
            values = tuple(float(t) for t in raw.replace(";", ",").split(",") if t.strip())
        except ValueError:
            raise FieldError(f"{label}: {raw!r} is not a comma-separated list of numbers") from None
        if not values or not all(math.isfinite(v) for v in values):
            raise FieldError(f"{label}: {raw!r} must list finite numbers")
        return values


def fmt_unc(value, std, unit: str, digits: int = 4) -> str:
    """``value ± std unit`` with a sensible number of digits; a dash when unknown."""
    if value is None or (isinstance(value, float) and not math.isfinite(value)):
        return "—"
    if std is None or not (isinstance(std, (int, float)) and math.isfinite(std)):
        return f"{value:.{digits}g} {unit}"
    return f"{value:.{digits}g} ± {std:.2g} {unit}"
