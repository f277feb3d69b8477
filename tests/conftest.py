"""Shared test fixtures.

- `case_paths`: every bundled case file (cases/*.yaml), sorted, as Paths.
- `case_path`: a test that takes this argument runs once per bundled case (ids = file stems).
- `ngspice`: skips the test with a clear reason when ngspice is not on PATH; returns the
  tests.ngspice_util module (run_ngspice, SpiceRun). Tests marked `@pytest.mark.ngspice`
  skip the same way even without the fixture.
- Every test session runs with DIAG_HOME set to a temporary folder, so no test touches
  the user's cache, sessions or cases (a test may still set its own with monkeypatch).
"""

from __future__ import annotations

import os
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
CASES_DIR = ROOT / "cases"
sys.path.insert(0, str(Path(__file__).resolve().parent))  # tests/ helpers: ngspice_util

import ngspice_util  # noqa: E402

CASE_PATHS = sorted(CASES_DIR.glob("*.yaml"))


def pytest_collection_modifyitems(config, items):
    """Tests marked `ngspice` skip with the reason when ngspice is missing, fixture or not."""
    if ngspice_util.have_ngspice():
        return
    skip = pytest.mark.skip(reason=ngspice_util.NGSPICE_MISSING)
    for item in items:
        if "ngspice" in item.keywords:
            item.add_marker(skip)


def pytest_generate_tests(metafunc):
    if "case_path" in metafunc.fixturenames:
        metafunc.parametrize("case_path", CASE_PATHS, ids=[p.stem for p in CASE_PATHS])


@pytest.fixture(scope="session")
def case_paths() -> list[Path]:
    """Every bundled case file, sorted by name."""
    assert CASE_PATHS, f"no bundled cases in {CASES_DIR}"
    return list(CASE_PATHS)


@pytest.fixture
def ngspice():
    """ngspice_util when ngspice is installed; otherwise skip with the reason."""
    if not ngspice_util.have_ngspice():
        pytest.skip(ngspice_util.NGSPICE_MISSING)
    return ngspice_util


@pytest.fixture(autouse=True, scope="session")
def _diag_home(tmp_path_factory):
    """Point diag's user folders at a session temporary folder."""
    old = os.environ.get("DIAG_HOME")
    os.environ["DIAG_HOME"] = str(tmp_path_factory.mktemp("diag_home"))
    yield
    if old is None:
        os.environ.pop("DIAG_HOME", None)
    else:
        os.environ["DIAG_HOME"] = old
