"""Command line: parses arguments and hands each command to its module in diag/commands.

The command modules format what the core returns; they compute nothing themselves.
Exit status: 0 success; 1 input understood but bad (case or readings errors, on stderr
with location); 2 usage errors.
"""

from __future__ import annotations

import argparse
import importlib
import sys

from diag.core.errors import DiagError

COMMANDS = {
    # name: (module under diag.commands, help)
    "open": ("open_", "open the bench interface on one case, resuming a session"),
    "check": ("check", "validate a case; print the healthy reading band at every point"),
    "faults": ("faults", "list every hypothesis, its prior, and groups no reading can split"),
    "diagnose": ("diagnose", "rank suspects for one unit's readings; propose the next reading"),
    "triage": ("triage", "rank suspects for every unit of a batch, with a summary"),
    "simulate": ("simulate", "print the readings of one random unit with a given fault"),
    "drill": ("drill", "a fault-finding exercise: hidden fault, simulated readings, a score"),
}


def build_parser(argv: list[str] | None = None) -> argparse.ArgumentParser:
    """The argument parser. Only the module of the command named in `argv` is imported
    (start-up time matters at the bench); with `argv` None every command is loaded."""
    chosen = None
    if argv is not None:
        chosen = next((a for a in argv if not a.startswith("-")), "")
    parser = argparse.ArgumentParser(
        prog="diag",
        description="Fault-finding in discrete transistor circuits. "
                    "With no command, opens the bench interface on the bundled cases.")
    from diag import __version__

    parser.add_argument("--version", action="version", version=f"diag {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    for name, (modname, help_) in COMMANDS.items():
        p = sub.add_parser(name, help=help_, description=help_[0].upper() + help_[1:] + ".")
        if chosen is None or chosen == name:
            mod = importlib.import_module(f"diag.commands.{modname}")
            mod.add_arguments(p)
            p.set_defaults(_run=mod.run)
    return parser


def main(argv: list[str] | None = None) -> int:
    if argv is None:
        argv = sys.argv[1:]
    parser = build_parser(argv)
    args = parser.parse_args(argv)
    try:
        if args.command is None:
            from diag.commands import open_

            return open_.run_picker(args)
        return int(args._run(args) or 0)
    except DiagError as exc:
        print(f"diag: {exc}", file=sys.stderr)
        return 1
    except KeyboardInterrupt:
        return 130
    except BrokenPipeError:
        return 0


if __name__ == "__main__":
    sys.exit(main())
