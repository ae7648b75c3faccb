"""Whole-process time of every ``mfma`` command that analyses data, against a plain script doing the same core work.

Each command runs as a user runs it (the ``mfma`` script, its own process, output thrown away) in turn with its
yardstick in ``plain/`` (numpy and only the scipy, h5py or matplotlib modules that work needs; nothing of the
project), A B A B ..., after one warm-up run of each; the figure is the median of the pairwise ratios (target:
1.5 or less). ``mfma drivers`` loads every plug-in, so its yardstick loads what the built-in drivers need
(numpy, pyzmq). ``mfma --help`` and ``mfma probes`` have an absolute target (0.15 s). Peak memory is each
process's own maximum resident set (kernel accounting; it counts the size of the process that started it too,
which is why the inputs are made in another process and the runner gives every benchmark a process of its own).
Inputs come from ``command_inputs.py`` (the published formulas of the tests) and a session of ``mfma run`` on the
default scenario for the report; they are made once and kept in the temporary folder.

Both run with ``PYTHONDONTWRITEBYTECODE`` removed from their environment, as in a user's shell: Python then keeps
the compiled project modules after the warm-up run instead of compiling some forty of them again in every timed
run (measured 0.05-0.08 s of a command here, where the variable is set for everything).

Where a command misses the target, a process that only loads every module the command loads
(``imports_only.py``) is timed beside the same plain script as well: the part of the ratio that the command's
imports alone account for, which no speed-up of its own work can remove.

``MFMA_BENCH_RUNS`` sets the number of timed pairs (default 5).
"""

from __future__ import annotations

import os
import subprocess
import sys
import tempfile
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))

from command_inputs import THERMAL_RATE_HZ, build  # noqa: E402
from timing import load_average, mfma_command, side_by_side, target  # noqa: E402

RATIO_TARGET = 1.5
START_TARGET_S = 0.15
PLAIN = HERE / "plain"
IMPORTS_ONLY = HERE / "imports_only.py"


def _session(folder: Path) -> Path:
    """A session of ``mfma run`` on the default scenario (seed 1), made once."""
    found = sorted(folder.glob("session-*.h5"))
    if found:
        return found[-1]
    subprocess.run(mfma_command() + ["run", "--seed", "1", "--out", str(folder), "--json"], check=True,
                   stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    return sorted(folder.glob("session-*.h5"))[-1]


def cases(inputs: dict[str, Path], session: Path, out: Path) -> dict[str, tuple[list[str], list[str]]]:
    """name: (mfma arguments, plain script and its arguments)."""
    py = sys.executable
    tip, ptip = out / "tip.npz", out / "plain_tip.npz"
    return {
        "analyze series": (["analyze", "series", str(inputs["series"]), "--json"],
                           [py, str(PLAIN / "series.py"), str(inputs["series"])]),
        "analyze thermal": (["analyze", "thermal", str(inputs["thermal"]), "--rate", f"{THERMAL_RATE_HZ:g}",
                             "--invols", "50", "--json"],
                            [py, str(PLAIN / "thermal.py"), str(inputs["thermal"]), f"{THERMAL_RATE_HZ:g}", "50"]),
        "analyze sweep": (["analyze", "sweep", str(inputs["sweep"]), "--json"],
                          [py, str(PLAIN / "sweep.py"), str(inputs["sweep"])]),
        "analyze sader": (["analyze", "sader", "--length-um", "225", "--width-um", "28", "--f0-hz", "75000",
                           "--q", "200", "--json"], [py, str(PLAIN / "sader.py"), "225", "28", "75000", "200"]),
        "analyze tip": (["analyze", "tip", str(inputs["ref"]), "--ms-ka-per-m", "600", "--thickness-nm", "12",
                         "--out", str(tip), "--json"],
                        [py, str(PLAIN / "tip.py"), str(inputs["ref"]), "600", "12", str(ptip)]),
        "analyze field": (["analyze", "field", str(inputs["sample"]), "--tip", str(tip), "--out",
                           str(out / "field.npz"), "--json"],
                          [py, str(PLAIN / "field.py"), str(inputs["sample"]), str(ptip), str(out / "pf.npz")]),
        "analyze loop": (["analyze", "loop", str(inputs["loop"]), "--json"],
                         [py, str(PLAIN / "loop.py"), str(inputs["loop"])]),
        "analyze image": (["analyze", "image", str(inputs["tracks"]), "--json"],
                          [py, str(PLAIN / "image.py"), str(inputs["tracks"])]),
        "report": (["report", str(session), "--out", str(out / "report"), "--json"],
                   [py, str(PLAIN / "report.py"), str(session), str(out / "plain_report")]),
    }


def _imports_only(argv: list[str], plain: list[str], work: Path, *, runs: int, env: dict) -> dict:
    """A process that loads every module the command loads and exits, timed beside the plain script: how much of
    a missed ratio no speed-up of the command's own work can take away (``imports_only.py``)."""
    listing = work / f"modules-{argv[1] if len(argv) > 1 else argv[0]}.txt"
    subprocess.run([sys.executable, str(IMPORTS_ONLY), "record", str(listing), *argv], check=True, env=env,
                   stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    return side_by_side([sys.executable, str(IMPORTS_ONLY), "load", str(listing)], plain, runs=runs, env=env)


def run(names: list[str] | None = None) -> dict:
    runs = int(os.environ.get("MFMA_BENCH_RUNS", "5"))
    folder = Path(tempfile.gettempdir()) / "mfma-bench-inputs"
    # made in a process of its own: this one stays small, and its size counts in every timed child's peak memory
    subprocess.run([sys.executable, str(HERE / "command_inputs.py"), str(folder)], check=True,
                   stdout=subprocess.DEVNULL)
    inputs = build(folder)
    session = _session(folder / "session")
    mfma = mfma_command()
    env = {**os.environ, "MFMA_DATA_DIR": str(folder / "data"), "MFMA_CONFIG_DIR": str(folder / "config")}
    env.pop("PYTHONDONTWRITEBYTECODE", None)
    out: dict = {"load_average_1min_start": load_average(), "runs": runs}
    targets = []
    with tempfile.TemporaryDirectory() as tmp:
        work = Path(tmp)
        for name, argv in (("mfma --help", ["--help"]), ("mfma probes", ["probes", "--json"])):
            r = side_by_side(mfma + argv, None, runs=runs, env=env)
            out[name] = r
            targets.append(target(f"{name}: whole process", r["a_wall_s"], START_TARGET_S, "s"))
        r = side_by_side(mfma + ["drivers", "--json"], [sys.executable, str(PLAIN / "drivers.py")], runs=runs, env=env)
        out["mfma drivers"] = r
        targets.append(target("drivers: whole process / plain script", r["ratio"], RATIO_TARGET, "x"))
        for name, (argv, plain) in cases(inputs, session, work).items():
            if names and name.split()[-1] not in names:
                continue
            r = side_by_side(mfma + argv, plain, runs=runs, env=env)
            if r["ratio"] > RATIO_TARGET:
                r["imports_only"] = _imports_only(argv, plain, work, runs=runs, env=env)
                sys.stderr.write(f"{name}: {r['ratio']:.2f}x the plain script; its imports alone "
                                 f"{r['imports_only']['ratio']:.2f}x ({r['imports_only']['a_wall_s']:.3f} s)\n")
            out[name] = r
            targets.append(target(f"{name}: whole process / plain script", r["ratio"], RATIO_TARGET, "x"))
    out["load_average_1min_end"] = load_average()
    out["targets"] = targets
    return out


if __name__ == "__main__":
    import json

    print(json.dumps(run(sys.argv[1:]), indent=2))
