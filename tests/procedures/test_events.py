"""Progress events and cancellation: the one vocabulary every long operation reports in."""

from __future__ import annotations

import threading

import pytest

from assistant.errors import AssistantError
from assistant.procedures.events import CancelToken, Cancelled, Notice, Progress, null_sink


def test_progress_and_notice_are_plain_frozen_records():
    p = Progress("series", 3, 8, "lines", 1.5, remaining_s=2.5, data={"row": 2})
    assert (p.what, p.done, p.total, p.unit, p.elapsed_s, p.remaining_s, p.data) == (
        "series", 3, 8, "lines", 1.5, 2.5, {"row": 2})
    assert Progress("x", 0, None, "s", 0.0).data == {} and Progress("x", 0, None, "s", 0.0).remaining_s is None
    with pytest.raises(AttributeError):
        p.done = 4  # type: ignore[misc]
    assert Notice("warning", "t") == Notice("warning", "t")
    assert null_sink(p) is None


def test_a_cancel_set_from_another_thread_stops_at_the_next_check():
    token = CancelToken()
    token.raise_if_set()  # not set: nothing happens
    t = threading.Thread(target=token.set)
    t.start()
    t.join()
    assert token.is_set()
    with pytest.raises(Cancelled, match="cancelled by the user") as err:
        token.raise_if_set()
    assert isinstance(err.value, AssistantError)
