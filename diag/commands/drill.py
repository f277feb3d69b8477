"""`diag drill CASE [--fault ID] [--seed N] [--hints] [--trainee NAME] [--results FILE]
[--exercises FILE]` opens the drill screen; `diag drill --summary FILE` prints the class
summary of a results CSV. The core is diag/core/drill.py.

The drill needs a terminal: without one (stdin or stdout not a TTY) it says so and exits
2 after checking its files, rather than waiting for keys that never come. An exercise
still running when the interface closes is recorded as abandoned."""

from __future__ import annotations

import argparse
import sys

from diag.commands import count


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("case", nargs="?", metavar="CASE",
                   help="case file (or bundled case name); optional with --exercises/--summary")
    p.add_argument("--fault", metavar="ID", help="hidden fault id (default: drawn by priors)")
    p.add_argument("--seed", type=count, metavar="N", help="seed of the drawn unit (replayable)")
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
    out.write(f"{'trainee':<{width}}  right  points  readings  advice  practise\n")
    for t in people:
        needs = "; ".join(t.needs) if t.needs else "nothing flagged"
        pts = "—" if t.points is None else f"{t.points:.0f}"
        out.write(f"{t.trainee:<{width}}  {t.correct:>2}/{t.exercises:<2}  {pts:>6}  "
                  f"{t.readings_used:>8}  {t.advice_readings:>6}  {needs}\n")
    out.write("\npoints: the mean score out of 100 per exercise; right: exercises found out "
              "of those run (left ones included)\n")


def plan(args: argparse.Namespace):
    """The exercises the arguments describe, with their cases loaded and their fault ids
    checked against the case (no ensemble built yet): (exercises, rules, cases by path).
    Raises DiagError on a bad exercises file, case or fault id."""
    from pathlib import Path

    from diag.core.case import find_case, load_case
    from diag.core.drill import Exercise, load_exercises
    from diag.core.errors import DiagError
    from diag.core.faults import parse_fault_id
    from diag.core.rules import load_rules

    if args.exercises:
        default = (str(find_case(args.case)) if args.case else None)
        exercises = load_exercises(args.exercises, default_case=default)
    else:
        path = str(find_case(args.case))
        exercises = (Exercise(case=path, fault=args.fault, seed=args.seed,
                              name=Path(path).stem),)
    rules = load_rules()
    cases = {}
    for ex in exercises:
        if ex.case not in cases:
            cases[ex.case] = load_case(ex.case, rules)
        if ex.fault:
            try:
                parse_fault_id(cases[ex.case], rules, ex.fault)
            except DiagError as exc:
                where = f"{ex.name}: {ex.fault}" if args.exercises else ex.fault
                raise DiagError(exc.message, file=ex.case, where=where,
                                hint="list the case's faults with `diag faults CASE`"
                                ) from None
    return exercises, rules, cases


def build_drill(args: argparse.Namespace, planned=None):
    """The Drill the arguments describe (or `planned`, what `plan` returned), with its
    engines built (progress on stderr)."""
    from diag.core.drill import Drill
    from diag.core.engine import Engine

    exercises, rules, cases = planned or plan(args)
    engines: dict = {}

    def engine_for(path: str):
        if path not in engines:
            eng = Engine(cases[path], rules, K=args.draws)
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


NO_TERMINAL = (
    "diag drill: the drill is interactive and needs a terminal (stdin and stdout are not "
    "one here, e.g. a pipe or CI).\n"
    "  Run it from a terminal, or, for the simulated readings of a unit without one:\n"
    "    diag simulate CASE --fault ID [--seed N]\n"
    "  (`diag faults CASE` lists the fault ids; `diag drill --summary FILE` works "
    "without a terminal.)\n")


def has_terminal() -> bool:
    """True when both stdin and stdout are terminals (the interface needs both)."""
    return all(getattr(s, "isatty", lambda: False)() for s in (sys.stdin, sys.stdout))


def run(args: argparse.Namespace) -> int:
    if args.summary:
        print_summary(args.summary)
        return 0
    if not args.case and not args.exercises:
        args._parser.error("give a CASE, --exercises FILE or --summary FILE")
    if args.draws < 8:
        args._parser.error("--draws must be at least 8")
    planned = plan(args)  # bad files and fault ids are reported first (exit 1)
    if not has_terminal():
        sys.stderr.write(NO_TERMINAL)
        return 2
    drill = build_drill(args, planned)
    from diag.tui.app import DiagApp

    try:
        DiagApp(drill=drill).run()
    finally:
        record_left(drill)
    return 0


def record_left(drill, out=None) -> None:
    """An exercise still running when the interface closed (ctrl+q, a closed terminal) is
    recorded as abandoned with its readings, and the trainee is told (on `out`, default
    stderr), so a class results file never silently lacks an attempt."""
    out = out or sys.stderr
    rnd = drill.round
    score = drill.abandon()
    if score is None:
        return
    where = f" in {drill.results}" if drill.results else " (no --results file given)"
    out.write(f"exercise {rnd.exercise.name!r} left before naming a fault: recorded as "
              f"abandoned with {score.readings_used} reading(s){where}\n")
