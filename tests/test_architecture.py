"""Architecture invariants written in DEVELOPERS.md, checked."""

import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]


def test_core_does_not_load_the_interface_toolkit():
    # STYLE.md: importing diag.core must not load textual or rich.
    code = (
        "import importlib, pkgutil, sys, diag.core\n"
        "for m in pkgutil.walk_packages(diag.core.__path__, 'diag.core.'):\n"
        "    importlib.import_module(m.name)\n"
        "bad = [m for m in sys.modules if m.split('.')[0] in ('textual', 'rich')]\n"
        "print(','.join(bad))\n"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         cwd=ROOT, check=True)
    assert out.stdout.strip() == "", f"diag.core loaded: {out.stdout.strip()}"


def test_only_the_rules_loader_reads_rules_folder():
    # DEVELOPERS.md: only diag/core/rules.py reads rules/ (paths.py only names the folder).
    offenders = []
    for path in (ROOT / "diag").rglob("*.py"):
        if path.name in ("rules.py", "paths.py"):
            continue
        if "rules_dir(" in path.read_text(encoding="utf-8"):
            offenders.append(str(path.relative_to(ROOT)))
    assert offenders == []


def test_only_the_solver_factors_matrices():
    # DEVELOPERS.md: only diag/core/solver.py assembles and factors matrices.
    offenders = []
    for path in (ROOT / "diag").rglob("*.py"):
        if path.name == "solver.py":
            continue
        text = path.read_text(encoding="utf-8")
        if "linalg.solve" in text or "lu_factor" in text or "linalg.inv" in text:
            offenders.append(str(path.relative_to(ROOT)))
    assert offenders == []
