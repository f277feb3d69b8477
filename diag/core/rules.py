"""The only reader of `rules/`: loads every YAML file there into read-only data.

Each consumer validates its own section (models by the part models, faults by the fault
module, ...); this module only finds, parses and hashes. `Rules.hash` changes when any
rules file changes, and keys caches.
"""

from __future__ import annotations

import hashlib
from dataclasses import dataclass
from functools import lru_cache
from pathlib import Path
from typing import Any

from diag.core.paths import rules_dir
from diag.core.yamlio import load_yaml_text

RULE_FILES = ("models", "meters", "faults", "collateral", "checks", "cautions")


@dataclass(frozen=True)
class Rules:
    """Parsed rules files keyed by stem (`models`, `meters`, ...), and their content hash."""

    folder: str
    data: dict
    hash: str

    def __getitem__(self, name: str) -> Any:
        return self.data.get(name, {})

    def file(self, name: str) -> str:
        """Path of one rules file, for error messages."""
        return str(Path(self.folder) / f"{name}.yaml")


@lru_cache(maxsize=8)
def _load(folder: str) -> Rules:
    h = hashlib.sha256()
    data: dict = {}
    for path in sorted(Path(folder).glob("*.yaml")):
        text = path.read_text(encoding="utf-8")
        h.update(path.name.encode() + b"\0" + text.encode() + b"\0")
        data[path.stem] = load_yaml_text(text, file=str(path)) or {}
    return Rules(folder=folder, data=data, hash=h.hexdigest()[:16])


def load_rules(folder: str | Path | None = None) -> Rules:
    """Load the rules folder (default: the bundled one). Cached per folder path."""
    return _load(str(Path(folder) if folder else rules_dir()))
