"""Where diag finds its data and keeps user files: the one place for folders.

Bundled `rules/` and `cases/` live beside the package in a source checkout and under
`diag/_data/` in an installed wheel. User folders (cache, sessions, user cases, first-start
marker) come from platformdirs; the environment variable DIAG_HOME moves all of them under
one folder (tests set it to a temporary directory).
"""

from __future__ import annotations

import os
from pathlib import Path

_PKG = Path(__file__).resolve().parent.parent


def _data_dir(name: str) -> Path:
    installed = _PKG / "_data" / name
    if installed.is_dir():
        return installed
    return _PKG.parent / name


def rules_dir() -> Path:
    """Folder of the bundled rules YAML files."""
    return _data_dir("rules")


def cases_dir() -> Path:
    """Folder of the bundled case files."""
    return _data_dir("cases")


def _user_dir(kind: str) -> Path:
    home = os.environ.get("DIAG_HOME")
    if home:
        p = Path(home) / kind
    else:
        import platformdirs

        if kind == "cache":
            p = Path(platformdirs.user_cache_dir("diag", appauthor=False))
        else:
            p = Path(platformdirs.user_data_dir("diag", appauthor=False)) / kind
    p.mkdir(parents=True, exist_ok=True)
    return p


def cache_dir() -> Path:
    """Ensemble cache (safe to delete)."""
    return _user_dir("cache")


def sessions_dir() -> Path:
    """Autosaved bench sessions."""
    return _user_dir("sessions")


def user_cases_dir() -> Path:
    """Cases the user keeps; listed beside the bundled ones."""
    return _user_dir("cases")


def state_dir() -> Path:
    """Small state such as the first-start marker."""
    return _user_dir("state")
