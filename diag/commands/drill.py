"""`diag drill CASE [--fault ID] [--seed N] [--hints] [--trainee NAME] [--results FILE]
[--exercises FILE]` opens the drill screen; `diag drill --summary FILE` prints the class
summary of a results CSV. The core is diag/core/drill.py."""

from __future__ import annotations

import argparse
import sys


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("case", nargs="?", metavar="CASE",
                   help="case file (or bundled case name); optional with --exercises/--summary")
    p.add_argument("--fault", metavar="ID", help="hidden fault id (default: drawn by priors)")
    p.add_argument("--seed", type=int, metavar="N", help="seed of the drawn unit (replayable)")
    p.add_argument("--hints", action="store_true",
                   help="let the trainee see diag's ranking while the drill runs")
    p.add_argument("--trainee", metavar="NAME", default="", help="name written to --results")
    p.add_argument("--results", metavar="FILE", help="append each score to this class CSV")
    p.add_argument("--exercises", metavar="FILE",
                   help="YAML file listing exercises (case, fault, seed)")
    p.add_argument("--summary", metavar="FILE", nargs="+",
                   help="print who needs which kind of practice from results CSV(s)")
    p.add_argument("--draws", type=int, default=128, metavar="K",
                   help="drawn units per hypothesis in the predictions (default 128)")
    p.set_defaults(_parser=p)


def print_summary(paths: list[str], out=None) -> None:
    """Print the class summary of one or more results CSVs (to `out`, default stdout)."""
    from diag.core.drill import read_results, summarise

    out = out or sys.stdout
    rows = read_results(paths)
    people = summarise(rows)
    out.write(f"Class summary: {len(people)} trainee(s), {len(rows)} exercise(s) "
              f"from {', '.join(paths)}\n\n")
    width = max([len(t.trainee) for t in people] + [7])
    out.write(f"{'trainee':<{width}}  right  readings  advice  practise\n")
    for t in people:
        needs = "; ".join(t.needs) if t.needs else "nothing flagged"
        out.write(f"{t.trainee:<{width}}  {t.correct:>2}/{t.exercises:<2}  "
                  f"{t.readings_used:>8}  {t.advice_readings:>6}  {needs}\n")


def build_drill(args: argparse.Namespace):
    """The Drill the arguments describe, with its engines built (progress on stderr)."""
    from pathlib import Path

    from diag.core.case import find_case, load_case
    from diag.core.drill import Drill, Exercise, load_exercises
    from diag.core.engine import Engine
    from diag.core.rules import load_rules

    if args.exercises:
        default = (str(find_case(args.case)) if args.case else None)
        exercises = load_exercises(args.exercises, default_case=default)
    else:
        path = str(find_case(args.case))
        exercises = (Exercise(case=path, fault=args.fault, seed=args.seed,
                              name=Path(path).stem),)
    rules = load_rules()
    engines: dict = {}

    def engine_for(path: str):
        if path not in engines:
            eng = Engine(load_case(path), rules, K=args.draws)
            tty = sys.stderr.isatty()
            if tty:
                sys.stderr.write(f"preparing {path} ...")
            eng.build()
            if tty:
                sys.stderr.write(" ready\n")
            engines[path] = eng
        return engines[path]

    for ex in exercises:
        engine_for(ex.case)
    return Drill(exercises, engine_for, trainee=args.trainee, hints=args.hints,
                 results=args.results)


def run(args: argparse.Namespace) -> int:
    if args.summary:
        print_summary(args.summary)
        return 0
    if not args.case and not args.exercises:
        args._parser.error("give a CASE, --exercises FILE or --summary FILE")
    if args.draws < 8:
        args._parser.error("--draws must be at least 8")
    drill = build_drill(args)
    from diag.tui.app import DiagApp

    DiagApp(drill=drill).run()
    return 0
