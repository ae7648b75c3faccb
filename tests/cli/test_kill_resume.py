"""Kill ``mfma run`` at random moments, by SIGKILL or Ctrl-C, at fast and realtime pace, on ``sim://`` and over the
ZeroMQ and serial links, and resume every run (tests/cli/kill_resume.py has the trial and its checks).

The schedule is drawn from a seeded generator. Every combination of signal, pace and link is stopped at two of
three kinds of moment: timed from the process start (start-up, calibration, approach), from the tip engaging
within the series, or from the tip engaging past the series (analysis, report, or after the end). How many land
where depends on the machine's load; the properties are checked in every trial. Long: marked slow; the default
suite runs single kills in test_run_e2e.py and test_run_over_links.py.
"""

from __future__ import annotations

import itertools
import os

import numpy as np
import pytest

from tests.cli.kill_resume import LINES, serve, stop, trial, without_pngs

TRIALS = int(os.environ.get("KILL_TRIALS", "24"))  # more for a longer look
SERIES_S = {"realtime": LINES * 5 / 20, "fast": 0.5}  # 10 lines x 5 passes at 20 lines/s; fast: computing only


def moment(anchor: str, pace: str, rng) -> tuple[float, bool]:
    """(delay in s, timed from the first line?) for one kind of moment."""
    if anchor == "start":
        return float(rng.uniform(0.5, 9.0)), False  # start-up to the first line: 2-8 s, by load
    if anchor == "series":
        return float(rng.uniform(0.0, SERIES_S[pace])), True
    return float(SERIES_S[pace] + rng.uniform(0.0, 3.0)), True


@pytest.mark.slow
@pytest.mark.timeout(3600)  # 24 trials take 3-5 min on two loaded cores; KILL_TRIALS=48 twice that
def test_kill_at_random_moments_then_resume(tmp_path, capsys, monkeypatch):
    without_pngs(monkeypatch)
    rng = np.random.default_rng(20261204)
    combos = list(itertools.product(("sigkill", "sigint"), ("fast", "realtime"), ("sim", "zmq", "serial")))
    anchors = ("start", "series", "late")
    servers = {}
    outcomes = []
    try:
        for i in range(TRIALS):
            kind, pace, link = combos[i % len(combos)]
            anchor = anchors[(i + i // len(combos)) % 3]
            delay, after_first = moment(anchor, pace, rng)
            url = "sim://"
            if link != "sim":
                if (link, pace) not in servers:
                    servers[(link, pace)] = serve(link, tmp_path, pace=pace)
                url = servers[(link, pace)][1]
            cwd = tmp_path / f"trial{i}"
            cwd.mkdir()
            o = trial(cwd, capsys, kind=kind, pace=pace, link=link, delay_s=delay, after_first_line=after_first,
                      url=url)
            outcomes.append(o)
            with capsys.disabled():
                print(f"\n{o.kind:7s} {o.pace:8s} {o.link:6s} {anchor:6s} delay {o.delay_s:4.2f} s exit "
                      f"{o.exit_code} lines {o.lines_before} complete {o.complete_before} resumed {o.resumed} "
                      f"{' '.join(o.notes)}")
    finally:
        for proc, _ in servers.values():
            stop(proc)
    # the schedule did reach the series: some runs were resumed from the middle of it
    assert sum(o.resumed and o.lines_before is not None and 0 < o.lines_before < LINES for o in outcomes) >= 2
