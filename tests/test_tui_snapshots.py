"""Snapshot tests of the main screens at 120x40 and 80x24 (pytest-textual-snapshot).

Output is deterministic: DIAG_HOME is a fresh temporary folder (no resumable session, the
first-start marker written), the engine is seeded, readings are typed as fixed text.
Snapshots live in tests/snapshots/; after a deliberate change of the look, review the
report and run `pytest tests/test_tui_snapshots.py --snapshot-update`.
"""

from __future__ import annotations

from pathlib import Path

import pytest
import pytest_textual_snapshot
from tui_support import (  # noqa: F401
    CASES,
    fixture_diag_home,
    fixture_shared_cache,
    settle,
    type_reading,
)

from diag.tui.app import MARKER, DiagApp

SNAPSHOTS = Path(__file__).resolve().parent / "snapshots"
SIZES = [(120, 40), (80, 24)]
pytestmark = pytest.mark.snapshot


@pytest.fixture(autouse=True)
def _snapshots_here(monkeypatch):
    """Keep this module's SVG files in tests/snapshots/ (syrupy's default is
    tests/__snapshots__/)."""

    def dirname(cls, *, test_location):
        return str(SNAPSHOTS / test_location.basename)

    monkeypatch.setattr(pytest_textual_snapshot.SVGImageExtension, "dirname",
                        classmethod(dirname))


def _readings_text(case_path: str) -> list[tuple[str, str, str]]:
    """Three fixed readings for the first three DC points: a third, half and a tenth of
    the highest value the validation allows there (plain arithmetic, no engine)."""
    from diag.core.case import load_case
    from diag.core.readings import limits

    case = load_case(case_path)
    lim = limits(case)
    out = []
    for o, f in zip([o for o in case.observables if o.kind == "dc"][:3], (0.1, 0.5, 0.33),
                    strict=False):
        hi = min(lim[(o.point, o.kind)][1], 20.0)
        out.append((o.point, o.kind, f"{hi * f:.3g}"))
    return out


@pytest.mark.parametrize("size", SIZES, ids=lambda s: f"{s[0]}x{s[1]}")
def test_picker(snap_compare, diag_home, size):
    assert snap_compare(DiagApp(), terminal_size=size)


@pytest.mark.parametrize("size", SIZES, ids=lambda s: f"{s[0]}x{s[1]}")
def test_first_start_cautions(snap_compare, diag_home, size):
    (diag_home / "state" / MARKER).unlink()
    assert snap_compare(DiagApp(), terminal_size=size)


@pytest.mark.parametrize("size", SIZES, ids=lambda s: f"{s[0]}x{s[1]}")
def test_session_with_readings(snap_compare, diag_home, size):
    case = str(CASES[0])

    async def run_before(pilot):
        await settle(pilot)
        for point, kind, text in _readings_text(case):
            await type_reading(pilot, point, kind, text)
        await settle(pilot)

    assert snap_compare(DiagApp(case_path=case), terminal_size=size, run_before=run_before)


@pytest.mark.parametrize("size", SIZES, ids=lambda s: f"{s[0]}x{s[1]}")
def test_suspect_detail(snap_compare, diag_home, size):
    case = str(CASES[0])

    async def run_before(pilot):
        await settle(pilot)
        for point, kind, text in _readings_text(case)[:2]:
            await type_reading(pilot, point, kind, text)
        await pilot.press("d")
        await settle(pilot)

    assert snap_compare(DiagApp(case_path=case), terminal_size=size, run_before=run_before)
