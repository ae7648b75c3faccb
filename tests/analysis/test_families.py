"""The analysis families: each keeps its private names to itself, and none loads a heavy module at import."""

from __future__ import annotations

import ast
import os
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[2]
ANALYSIS = ROOT / "assistant" / "analysis"
HEAVY = ("scipy.signal", "scipy.stats", "matplotlib", "h5py", "textual")


def families() -> list[str]:
    return sorted(p.parent.name for p in ANALYSIS.glob("*/__init__.py"))


def _module_name(path: Path) -> str:
    parts = path.relative_to(ROOT).with_suffix("").parts
    return ".".join(parts[:-1] if parts[-1] == "__init__" else parts)


def _family_of(module: str) -> str | None:
    parts = module.split(".")
    return parts[2] if len(parts) > 2 and parts[:2] == ["assistant", "analysis"] and parts[2] in families() else None


def foreign_private_names(source: str, module: str, *, is_package: bool = False) -> list[str]:
    """``module.name`` for every underscore name that ``module`` takes from another analysis family: imported by
    name, or read as an attribute of another family's module imported under an alias."""
    own = _family_of(module)
    package = module if is_package else module.rsplit(".", 1)[0]
    found, aliases = [], {}
    for node in ast.walk(ast.parse(source)):
        if isinstance(node, ast.ImportFrom):
            base = node.module or ""
            if node.level:
                anchor = package.split(".")[: len(package.split(".")) - node.level + 1]
                base = ".".join(anchor + ([base] if base else []))
            for alias in node.names:
                target = f"{base}.{alias.name}"
                fam = _family_of(base) or _family_of(target)
                if fam is None or fam == own:
                    continue
                if alias.name.startswith("_"):
                    found.append(target)
                aliases[alias.asname or alias.name] = target
        elif isinstance(node, ast.Import):
            for alias in node.names:
                if _family_of(alias.name) not in (None, own):
                    aliases[alias.asname or alias.name.split(".")[0]] = alias.name
    for node in ast.walk(ast.parse(source)):
        if isinstance(node, ast.Attribute) and node.attr.startswith("_") and not node.attr.startswith("__"):
            chain = []
            value = node.value
            while isinstance(value, ast.Attribute):
                chain.append(value.attr)
                value = value.value
            if isinstance(value, ast.Name) and value.id in aliases:
                found.append(".".join([aliases[value.id], *reversed(chain), node.attr]))
    return found


def test_there_are_families_to_check():
    assert {"calibration", "lift_series", "media", "quantitative", "field_series"} <= set(families())


def test_the_check_finds_a_foreign_private_name():
    # the check itself, on made-up modules of the lift_series family
    mod = "assistant.analysis.lift_series.example"
    assert foreign_private_names("from ..calibration.thermal_fit import _find_peak\n", mod) == [
        "assistant.analysis.calibration.thermal_fit._find_peak"]
    assert foreign_private_names("from assistant.analysis.calibration import thermal_fit as tf\nx = tf._Peak\n",
                                 mod) == ["assistant.analysis.calibration.thermal_fit._Peak"]
    assert foreign_private_names("import assistant.analysis.calibration.spectra as s\ns._BATCH_SAMPLES\n", mod) == [
        "assistant.analysis.calibration.spectra._BATCH_SAMPLES"]
    assert foreign_private_names("from .frequencies import pixel_pair_m\nfrom ._x import _y\n", mod) == []
    assert foreign_private_names("from ..calibration import fit_drive_sweep\n", mod) == []


@pytest.mark.parametrize("family", families())
def test_no_family_imports_another_familys_private_names(family):
    bad = []
    for path in sorted((ANALYSIS / family).rglob("*.py")):
        bad += foreign_private_names(path.read_text(encoding="utf-8"), _module_name(path),
                                     is_package=path.name == "__init__.py")
    assert bad == []


def test_importing_a_family_loads_no_heavy_module():
    # every module of every family, not only the packages: none needs scipy.signal, scipy.stats, matplotlib,
    # h5py or textual at import (calibration.spectra loads scipy.signal when a spectrum is computed); nor do the
    # CLI and the procedures behind `mfma analyze ...` before they read their input, nor a probe record
    imports = ", ".join(["assistant.analysis"] + [f"assistant.analysis.{family}" for family in families()])
    code = (f"import sys, importlib, pkgutil, {imports}\n"
            "import assistant.analysis as a\n"
            "for m in pkgutil.walk_packages(a.__path__, 'assistant.analysis.'): importlib.import_module(m.name)\n"
            "import assistant.cli, assistant.cli.cmd_analyze, assistant.cli.cmd_analyze_image, "
            "assistant.cli.cmd_analyze_loop, assistant.cli.cmd_quantitative, assistant.cli.cmd_probes, "
            "assistant.procedures.analyse, assistant.storage.probe_record\n"
            f"print(','.join(m for m in {HEAVY!r} if m in sys.modules))\n")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, cwd=ROOT, check=True)
    assert out.stdout.strip() == ""


def test_a_family_loads_only_the_modules_a_name_needs():
    # the package itself loads none of its modules; asking for one name loads that name's module
    code = ("import sys, assistant.analysis.lift_series as f\n"
            "before = sorted(m for m in sys.modules if m.startswith('assistant.analysis.lift_series.'))\n"
            "f.ProbeModel\n"
            "after = sorted(m for m in sys.modules if m.startswith('assistant.analysis.lift_series.'))\n"
            "print(before, after, 'scipy' in sys.modules)\n")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, cwd=ROOT, check=True)
    assert out.stdout.strip() == "[] ['assistant.analysis.lift_series.probe'] False"


@pytest.mark.parametrize("family", families())
def test_every_public_name_of_a_family_is_found(family):
    # the table of a family's __init__ names the module that really holds each public name
    import importlib

    package = importlib.import_module(f"assistant.analysis.{family}")
    names = getattr(package, "__all__", None) or [n for n in dir(package) if not n.startswith("_")]
    missing = [n for n in names if not hasattr(package, n)]
    assert names and missing == []
    with pytest.raises(AttributeError):
        package.no_such_name  # noqa: B018


def test_commands_load_only_what_they_use(tmp_path):
    # measured as whole processes (tests/benchmarks/bench_commands.py): scipy.optimize alone takes 0.2 s to load,
    # scipy.fft 0.15-0.2 s, numpy 0.1 s, scipy.ndimage 0.04 s beyond scipy.fft. A heights-only decomposition with
    # the reflected fit fits nothing with scipy.optimize, takes its cosine transforms from numpy's FFT and,
    # without missing pixels or a repeat pass, filters nothing with scipy.ndimage; and `mfma probes --json` has
    # no numpy value to write, so none of them may load those
    import numpy as np

    from tests.analysis.lift_series.synthetic_series import build_series

    heights = np.array([20e-9, 35e-9, 60e-9])
    s = build_series(rows=32, cols=32, heights_m=heights, noise_deg=0.05, magnetic_scale=0.3, seed=1)
    np.savez(tmp_path / "s.npz", phase_deg=s.phase_deg, heights_nm=heights * 1e9, pixel_nm=s.pixel_m * 1e9)
    code = ("import sys, io, contextlib\n"
            "from assistant.cli import main\n"
            "def run(*argv):\n"
            "    with contextlib.redirect_stdout(io.StringIO()):\n"
            "        assert main(list(argv)) == 0\n"
            "    return [m for m in ('numpy', 'scipy.optimize', 'scipy.ndimage', 'scipy.fft') if m in sys.modules]\n"
            "print(run('probes', '--json'), run('analyze', 'series', sys.argv[1], '--json'))\n")
    env = {**os.environ, "MFMA_DATA_DIR": str(tmp_path / "data")}
    out = subprocess.run([sys.executable, "-c", code, str(tmp_path / "s.npz")], capture_output=True, text=True,
                         cwd=ROOT, check=True, env=env)
    assert out.stdout.strip().splitlines()[-1] == "[] ['numpy']", out.stdout + out.stderr
