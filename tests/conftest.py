"""Shared fixtures: a reduced-size demo run, built once per test session."""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import pytest

REPO = Path(__file__).resolve().parents[1]

# Every run in the tests is evaluated as of one fixed date, so that runs compared with each
# other never straddle midnight (days since inspection, future-date checks).
os.environ.setdefault("ALTIGRADE_RUN_DATE", "2026-12-01")
SMALL_DEMO = ("--cells", "250", "--stations", "40")


def run_cli(*args: str, cwd: Path | None = None, env: dict | None = None, timeout: float = 600):
    """Run ``altigrade`` as a real subprocess (``python -m pipeline.cli``)."""
    full_env = {**os.environ, **(env or {})}
    return subprocess.run(
        [sys.executable, "-m", "pipeline.cli", *args],
        cwd=cwd or REPO,
        env=full_env,
        capture_output=True,
        text=True,
        timeout=timeout,
    )


def bench_harness():
    """benchmarks/run.py, imported as a module of its own (it is a script, not a package)."""
    import importlib.util

    spec = importlib.util.spec_from_file_location(
        "altigrade_benchmarks_run", REPO / "benchmarks" / "run.py"
    )
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


@pytest.fixture(scope="session")
def demo_cache(tmp_path_factory) -> Path:
    return tmp_path_factory.mktemp("demo-cache")


@pytest.fixture(scope="session")
def small_demo_run(tmp_path_factory, demo_cache):
    """The demo at reduced size, run once through the real CLI: (out_dir, completed process)."""
    out = tmp_path_factory.mktemp("demo-run") / "out"
    proc = run_cli("demo", *SMALL_DEMO, "--out", str(out), "--cache-dir", str(demo_cache))
    assert proc.returncode == 0, proc.stdout + proc.stderr
    return out, proc


@pytest.fixture(scope="session")
def small_demo_inputs(small_demo_run, demo_cache) -> Path:
    folders = sorted(demo_cache.glob("demo-*"))
    assert folders, "demo inputs not built"
    return folders[0]
