"""Helpers for the interface tests (test_tui_*.py, test_session.py): a private DIAG_HOME,
the bundled case paths, and Pilot waits that need no sleeps.

Fixtures: a test module imports `fixture_diag_home` and `fixture_shared_cache`; pytest
knows them by their names `diag_home` and `shared_cache`."""

from __future__ import annotations

import os
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
CASES = sorted((ROOT / "cases").glob("*.yaml"))


@pytest.fixture(scope="session", name="shared_cache")
def fixture_shared_cache(tmp_path_factory) -> Path:
    """One ensemble cache for every interface test (the cache is keyed by case and rules
    content, so sharing it changes no result, only the time)."""
    return tmp_path_factory.mktemp("diag_cache")


@pytest.fixture(name="diag_home")
def fixture_diag_home(tmp_path, monkeypatch, shared_cache):
    """DIAG_HOME in a temporary folder (sessions, state, user cases of this test only; the
    ensemble cache shared), with the first-start marker already written (tests of the
    first start remove it)."""
    home = tmp_path / "home"
    home.mkdir()
    (home / "cache").symlink_to(shared_cache, target_is_directory=True)
    monkeypatch.setenv("DIAG_HOME", str(home))
    from diag.tui.app import mark_started

    mark_started()
    return home


async def settle(pilot) -> None:
    """Wait until every worker has finished and the screen has processed its messages."""
    app = pilot.app
    for _ in range(20):
        await app.workers.wait_for_complete()
        await pilot.pause()
        if not any(w.is_running for w in app.workers):
            await pilot.pause()
            if not any(w.is_running for w in app.workers):
                return


def env_with_home(home: Path) -> dict[str, str]:
    env = dict(os.environ)
    env["DIAG_HOME"] = str(home)
    return env


async def type_reading(pilot, point: str, kind: str, text: str, keys: bool = True) -> None:
    """Move the points table to (point, kind), type `text` in place and press enter, then
    wait for the ranking. With keys=False only the first character is a key press (it
    opens the entry in place) and the rest is put in the field at once (faster)."""
    from diag.tui.points_table import PointsTable, row_key

    screen = pilot.app.screen
    table = screen.query_one(PointsTable)
    table.focus()
    table.move_cursor(row=table.get_row_index(row_key(point, kind)), animate=False)
    await pilot.pause()
    names = [{".": "full_stop", "-": "minus", "+": "plus", " ": "space"}.get(c, c)
             for c in text]
    if keys:
        await pilot.press(*names, "enter")
    else:
        from textual.widgets import Input

        await pilot.press(names[0])
        entry = screen.query_one("#entry", Input)
        entry.value = text
        await pilot.press("enter")
    await settle(pilot)


def value_text(x: float) -> str:
    """A reading as a technician would type it (plain decimal, 4 significant figures)."""
    return f"{x:.4g}"


def sync(fn):
    """Run an async test function to completion (no asyncio plugin needed)."""
    import asyncio
    import functools

    @functools.wraps(fn)
    def wrapper(*args, **kwargs):
        return asyncio.run(fn(*args, **kwargs))

    return wrapper

# the names other test modules already import (the fixture objects themselves)
diag_home = fixture_diag_home
shared_cache = fixture_shared_cache
