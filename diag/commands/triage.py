"""`diag triage CASE BATCH [--json] [--out FILE] [--format md|csv|json] [--top N]
[--browse]`: rank every unit of a batch readings CSV and sum up across the batch.

Markdown to stdout by default, `--json` for scripts (SPEC section 5). `--out FILE` writes
the report there instead (format from `--format`, else from the file's extension).
Refused rows are reported on stderr, once each, with their row number and unit, and the
rest is triaged; the exit status is then 1, as for `diagnose` (SPEC section 4: the input
was understood but part of it is bad), with the report written all the same. The report
lists them too, except when it goes to the same terminal as stderr: it then counts them
and points to the messages above. A progress bar goes to
stderr when it is a terminal and the batch is long. Every report closes with the safety
cautions. The core is diag/core/triage.py.
"""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path

from diag.commands import count

# Batches with at least this many units get a progress bar (on a terminal only).
PROGRESS_MIN_UNITS = 200


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("case", metavar="CASE", help="case file")
    p.add_argument("batch", metavar="BATCH", help="batch readings CSV (unit,point[,kind],value)")
    p.add_argument("--json", action="store_true", help="print JSON (SPEC section 5)")
    p.add_argument("--out", metavar="FILE", help="write the report to FILE")
    p.add_argument("--format", choices=("md", "csv", "json"),
                   help="report format for --out (default: from its extension, else md)")
    p.add_argument("--top", type=int, metavar="N",
                   help="suspects listed per unit (default 3; JSON lists all without --top)")
    p.add_argument("--healthy-prior", type=float, metavar="P",
                   help="prior probability that a unit is healthy")
    p.add_argument("--draws", type=int, default=128, metavar="K",
                   help="drawn units per hypothesis in the predictions (default 128)")
    p.add_argument("--seed", type=count, default=0, metavar="N", help="seed of the predictions")
    p.add_argument("--browse", action="store_true",
                   help="open the triaged batch in the interface")
    p.set_defaults(_parser=p)


class _Bar:
    """A one-line progress bar on stderr."""

    def __init__(self, label: str) -> None:
        self.label = label
        self.last = -1

    def __call__(self, f: float) -> None:
        pct = int(100 * min(max(f, 0.0), 1.0))
        if pct != self.last:
            self.last = pct
            filled = pct * 30 // 100
            sys.stderr.write(f"\r{self.label} [{'#' * filled}{'.' * (30 - filled)}] {pct:3d}%")
            sys.stderr.flush()

    def done(self) -> None:
        sys.stderr.write("\n")


def _format(args: argparse.Namespace) -> str:
    if args.format:
        return args.format
    if args.json:
        return "json"
    if args.out:
        ext = Path(args.out).suffix.lower().lstrip(".")
        return {"csv": "csv", "json": "json"}.get(ext, "md")
    return "md"


def run(args: argparse.Namespace) -> int:
    from diag.core.case import load_case
    from diag.core.engine import Engine
    from diag.core.readings import parse_file
    from diag.core.rules import load_rules
    from diag.core.triage import (
        caution_lines,
        refused_rows,
        solves_further_first,
        to_csv,
        to_json,
        to_markdown,
        triage,
    )

    if args.top is not None and args.top < 1:
        args._parser.error("--top must be at least 1")
    if args.healthy_prior is not None and not 0 < args.healthy_prior < 1:
        args._parser.error("--healthy-prior must lie between 0 and 1")
    rules = load_rules()
    case = load_case(args.case)
    eng = Engine(case, rules, K=args.draws, seed=args.seed)
    rf = parse_file(args.batch, case, rules)
    if rf.batch:
        units = rf.units
        rejected = refused_rows(rf.errors, rf.row_units)
    else:
        name = Path(args.batch).stem
        units = {name: rf.single()}
        rejected = refused_rows(rf.errors, unit=name)
    for r in rejected:
        print(f"diag: {r.text}", file=sys.stderr)
    bar = None
    if sys.stderr.isatty() and len(units) >= PROGRESS_MIN_UNITS:
        pre = _Bar("predictions")
        eng.build(progress=pre)
        pre.done()
        if solves_further_first(eng, len(units)):
            more = _Bar("further units of every suspect")
            eng.build_further(progress=more)
            more.done()
        bar = _Bar(f"triage {len(units)} units")
    res = triage(eng, units, rejected=rejected, progress=bar,
                 healthy_prior=args.healthy_prior)
    if bar is not None:
        bar.done()
    cautions = caution_lines(rules)
    fmt = _format(args)
    if fmt == "json":
        text = json.dumps(to_json(res, args.case, cautions, top=args.top), indent=2) + "\n"
    elif fmt == "csv":
        text = to_csv(res, cautions)
    else:
        # on a terminal the refused rows are on screen already (stderr, above)
        shown = not args.out and sys.stdout.isatty() and sys.stderr.isatty()
        text = to_markdown(res, args.case, cautions, top=args.top or 3,
                           list_refused=not shown)
    if args.out:
        Path(args.out).write_text(text, encoding="utf-8")
        refused = (f"; {len(rejected)} refused row{'s' if len(rejected) != 1 else ''} "
                   "listed in it" if rejected else "")
        print(f"wrote {args.out} ({len(res.units)} units{refused})", file=sys.stderr)
    else:
        sys.stdout.write(text)
    if args.browse:
        from diag.tui.app import DiagApp

        DiagApp(batch=res).run()
    return 1 if rejected else 0
