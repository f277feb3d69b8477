"""`diag open CASE [--session FILE]` and bare `diag`: start the bench interface.

The case (and the session file, when given) is read before the interface starts, so a
bad file is reported on stderr with its location and exit status 1.
"""

from __future__ import annotations

import argparse


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("case", metavar="CASE", help="case file (YAML)")
    p.add_argument("--session", metavar="FILE", default=None,
                   help="resume this session file instead of the case's autosaved one")


def run(args: argparse.Namespace) -> int:
    from diag.core.case import load_case
    from diag.core.session import load_session

    load_case(args.case)
    if args.session:
        load_session(args.session)
    from diag.tui.app import DiagApp

    DiagApp(case_path=args.case, session_path=args.session).run()
    return 0


def run_picker(args: argparse.Namespace) -> int:
    from diag.tui.app import DiagApp

    DiagApp().run()
    return 0
