"""A real-terminal smoke test: the installed `diag` under tmux, driven by send-keys and
read back with capture-pane, asserting what a person would see. Also checks that a kill
between two readings loses nothing that was typed before it (resume on restart)."""

from __future__ import annotations

import os
import shutil
import subprocess
import time
from pathlib import Path

import pytest
from tui_support import CASES

TMUX = shutil.which("tmux")
DIAG = shutil.which("diag")
pytestmark = [
    pytest.mark.skipif(TMUX is None, reason="tmux is not installed (apt-get install tmux)"),
    pytest.mark.skipif(DIAG is None, reason="the `diag` console script is not installed "
                       "(pip install -e .)"),
]


SOCK = ["-L", f"diag-test-{os.getpid()}"]  # a private tmux server, never the user's


def tmux(*args: str, **kw) -> subprocess.CompletedProcess:
    return subprocess.run([TMUX, *SOCK, *args], **kw)


@pytest.fixture
def server():
    """The private tmux server, kept alive between panes by an idle session."""
    tmux("new-session", "-d", "-s", "keeper", "sleep", "600", check=True)
    yield
    tmux("kill-server", capture_output=True)


class Pane:
    """One detached tmux session running a command in a 120x40 window."""

    def __init__(self, name: str, cmd: list[str], env: dict[str, str], cwd: Path):
        self.name = name
        envs = [a for k, v in env.items() for a in ("-e", f"{k}={v}")]
        # COLUMNS/LINES inherited from the test runner would pin the app at their size
        tmux("new-session", "-d", "-s", name, "-x", "120", "-y", "40", "-c", str(cwd),
             *envs, "env", "-u", "COLUMNS", "-u", "LINES", *cmd, check=True)

    def text(self) -> str:
        out = tmux("capture-pane", "-p", "-t", self.name, capture_output=True, text=True)
        return out.stdout

    def wait_for(self, needle: str, timeout: float = 30.0) -> str:
        """Poll the pane until `needle` shows (a wait for a condition, not a timing)."""
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            t = self.text()
            if needle in t:
                return t
            time.sleep(0.1)
        raise AssertionError(f"{needle!r} never appeared; the pane shows:\n{self.text()}")

    def keys(self, *keys: str) -> None:
        tmux("send-keys", "-t", self.name, *keys, check=True)

    def pid(self) -> int:
        out = tmux("list-panes", "-t", self.name, "-F", "#{pane_pid}", capture_output=True,
                   text=True, check=True)
        return int(out.stdout.split()[0])

    def close(self) -> None:
        tmux("kill-session", "-t", self.name, capture_output=True)


@pytest.fixture
def home(tmp_path):
    h = tmp_path / "home"
    h.mkdir()
    return h


def test_diag_open_in_a_real_terminal(server, home, tmp_path):
    case = CASES[0]
    from diag.core.case import load_case

    c = load_case(str(case))
    env = {"DIAG_HOME": str(home), "TERM": "xterm-256color"}
    name = f"diag-smoke-{os.getpid()}"
    pane = Pane(name, [DIAG, "open", str(case)], env, tmp_path)
    try:
        pane.wait_for("Before you power anything up")       # first start: cautions
        pane.wait_for("Charged capacitors")
        pane.keys("Enter")
        screen = pane.wait_for("next reading →")             # predictions built, ranked
        assert c.title in screen
        for p in c.points:
            assert p.id in screen
        assert "posterior" in screen and "healthy" in screen
        first = c.observables[0]
        pane.keys("1", ".", "2", "5", "Enter")
        screen = pane.wait_for(f"{first.point} {first.kind} recorded")
        assert "1.25" in screen, screen
        pane.keys("4", "k", "k", "Enter")                    # a bad value: clear message
        screen = pane.wait_for("other readings kept")
        assert "4kk" in screen
        saved = home / "sessions"
        assert any(saved.glob("*.json"))
        os.kill(pane.pid(), 9)                                # killed between two readings
    finally:
        pane.close()

    pane = Pane(name + "b", [DIAG, "open", str(case)], env, tmp_path)
    try:
        screen = pane.wait_for("Pick up where you left off?")
        assert "with 1 reading" in screen
        assert "Before you power anything up" not in screen  # the marker was kept
        pane.keys("y")
        screen = pane.wait_for("next reading →")
        assert "1.25" in screen
        pane.keys("C-q")                                      # quits cleanly
        deadline = time.monotonic() + 15
        while time.monotonic() < deadline and name + "b" in tmux(
                "ls", capture_output=True, text=True).stdout:
            time.sleep(0.1)
        assert name + "b" not in tmux("ls", capture_output=True, text=True).stdout
    finally:
        pane.close()
