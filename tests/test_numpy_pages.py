"""The CLI asks NumPy for ordinary pages unless the user chose (``NUMPY_MADVISE_HUGEPAGE``).

Checked in fresh interpreters, against NumPy itself: ``_set_madvise_hugepage`` returns the
setting NumPy took at import (NumPy reference manual, "Global state"; the function is NumPy's
own switch, private, used here only to read the setting back).
"""

from __future__ import annotations

import os
import subprocess
import sys

import pytest
from conftest import REPO

PROBE = (
    "from pipeline.cli import small_pages_for_numpy as f\n"
    "print(f())\n"
    "import numpy\n"
    "print(numpy._core.multiarray._set_madvise_hugepage(True))\n"
)


def probe(env_value: str | None) -> list[str]:
    env = {k: v for k, v in os.environ.items() if k != "NUMPY_MADVISE_HUGEPAGE"}
    if env_value is not None:
        env["NUMPY_MADVISE_HUGEPAGE"] = env_value
    env["PYTHONPATH"] = str(REPO)
    r = subprocess.run(
        [sys.executable, "-c", PROBE], env=env, capture_output=True, text=True, timeout=120
    )
    assert r.returncode == 0, r.stderr
    return r.stdout.split()


def test_unset_means_numpy_imports_with_huge_page_advice_off():
    assert probe(None) == ["True", "False"]


@pytest.mark.parametrize("value, numpy_setting", [("1", "True"), ("0", "False")])
def test_a_value_the_user_set_is_kept(value, numpy_setting):
    assert probe(value) == ["False", numpy_setting]


def test_nothing_changes_once_numpy_is_imported():
    import numpy  # noqa: F401  (already imported by the test session; stated for the reader)

    from pipeline.cli import small_pages_for_numpy

    env: dict[str, str] = {}
    assert small_pages_for_numpy(env) is False
    assert env == {}
