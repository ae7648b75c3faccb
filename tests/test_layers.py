"""The layers point down only (DESIGN: analysis is pure, the simulated stage knows nothing of us, drivers never
import the assistant). Checked with import-linter against the contracts in pyproject.toml."""

from __future__ import annotations

import shutil
import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]


def test_import_contracts_hold():
    exe = shutil.which("lint-imports") or str(Path(sys.executable).with_name("lint-imports"))
    out = subprocess.run([exe, "--config", str(ROOT / "pyproject.toml")], cwd=ROOT, capture_output=True, text=True)
    assert out.returncode == 0, out.stdout + out.stderr


def test_analysis_imports_only_numpy_and_scipy():
    code = (
        "import sys, assistant.analysis as a, pkgutil, importlib\n"
        "for m in pkgutil.walk_packages(a.__path__, 'assistant.analysis.'): importlib.import_module(m.name)\n"
        "bad = sorted(n for n in sys.modules if n.split('.')[0] in "
        "{'h5py','matplotlib','zmq','serial','textual','drivers','simulated_stage'})\n"
        "print(','.join(bad))\n"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, cwd=ROOT, check=True)
    assert out.stdout.strip() == ""
