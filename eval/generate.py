"""Generate bench units with ngspice and write them as a SPEC batch plus a truth file.

    python -m eval.generate --out DIR [--case CASE ...] [--per-fault N] [--healthy N]
                            [--blunder N] [--unmodelled N] [--seed N]
    python -m eval.generate --case CASE --units N --out DIR      # a mixed triage batch

Sets: `fault` (every modelled single fault of SPEC section 3, made physical), `healthy`,
`blunder` (a healthy or faulty unit with one reading mis-taken), `unmodelled` (two
unrelated faults, a solder bridge, a transistor fitted with collector and emitter swapped).
Each case gives DIR/<case>-batch.csv (`unit,point,kind,value`) and DIR/<case>-truth.csv
(`unit,fault,set,detail`). Unit ids are shuffled so the batch order tells nothing.
AC readings are what a meter shows of the tone at the case's amplitude: small-signal where
the unit behaves linearly, transient runs where it does not (`--transient`, see
`measure_benches`).
"""

from __future__ import annotations

import argparse
import csv
import json
import math
import sys
import zlib
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from diag.core.case import Case, load_case
from diag.core.paths import cases_dir
from diag.core.rules import load_rules
from eval import inject, meterlike
from eval.spicerun import ngspice_path, run_decks_tags
from eval.unit import BenchUnit, bench, draw_unit, measure_script, power_up_deck, transient_script

# Shares of a mixed triage batch (--units N): healthy, single fault, blunder, unmodelled.
MIX = {"healthy": 0.15, "fault": 0.65, "blunder": 0.10, "unmodelled": 0.10}


@dataclass
class GenUnit:
    """One generated unit: its truth and, once measured, what the meter showed per
    observable (None where the display overloaded or ngspice gave no answer)."""

    set: str
    fault: str
    detail: str
    bench: BenchUnit
    seed: int
    true: list[float] = field(default_factory=list)
    shown: list[float | None] = field(default_factory=list)
    id: str = ""
    alone: list[tuple[str, BenchUnit]] = field(default_factory=list)


def plan(case: Case, rng: np.random.Generator, per_fault: int, healthy: int,
         blunder: int, unmodelled: int) -> list[tuple[str, str | None]]:
    """The (set, fault-or-kind) list of units to build."""
    faults = inject.single_faults(case)
    out: list[tuple[str, str | None]] = [("healthy", None)] * healthy
    out += [("fault", f) for f in faults for _ in range(per_fault)]
    for _ in range(blunder):
        out.append(("blunder", None if rng.random() < 1 / 3 else faults[
            rng.integers(len(faults))]))
    kinds = inject.unmodelled_kinds(case)
    out += [("unmodelled", kinds[i % len(kinds)]) for i in range(unmodelled if kinds else 0)]
    return out


def plan_mix(case: Case, rng: np.random.Generator, n: int) -> list[tuple[str, str | None]]:
    """A triage batch of `n` units drawn with the MIX shares (faults uniform over modes)."""
    faults = inject.single_faults(case)
    kinds = inject.unmodelled_kinds(case) or [None]
    sets = rng.choice(list(MIX), size=n, p=list(MIX.values()))
    out: list[tuple[str, str | None]] = []
    for s in sets:
        if s == "fault":
            out.append(("fault", faults[rng.integers(len(faults))]))
        elif s == "blunder":
            out.append(("blunder", None if rng.random() < 1 / 3 else faults[
                rng.integers(len(faults))]))
        elif s == "unmodelled" and kinds[0] is not None:
            out.append(("unmodelled", kinds[rng.integers(len(kinds))]))
        else:
            out.append(("healthy", None))
    return out


def build(case: Case, what: tuple[str, str | None], seed: int) -> GenUnit:
    """Draw the unit for one plan entry from its own seed."""
    rng = np.random.default_rng(seed)
    u = draw_unit(case, rng)
    s, arg = what
    if s == "healthy" or (s == "blunder" and arg is None):
        return GenUnit(s, "healthy", "", u, seed)
    if s in ("fault", "blunder"):
        return GenUnit(s, arg, inject.apply_fault(u, arg, rng), u, seed)
    label, detail, alone = inject.apply_unmodelled(u, arg, rng)
    return GenUnit(s, label, detail, u, seed, alone=alone)


def measure(case: Case, units: list[GenUnit], jobs: int | None = None,
            transient: str | None = None, stats: dict | None = None) -> None:
    """Run every unit's decks in ngspice; fill `true` (loaded meter input, volts/amperes).
    `transient` and `stats` as in `measure_benches`."""
    res = measure_benches(case, [g.bench for g in units], jobs, transient, stats)
    for g, r in zip(units, res, strict=True):
        g.true = r


def measure_benches(case: Case, units: list[BenchUnit], jobs: int | None = None,
                    transient: str | None = None,
                    stats: dict | None = None) -> list[list[float]]:
    """Every observable of every unit as the meter reads it (volts, amperes; NaN where
    ngspice gave no answer). DC readings and supply currents are operating points; AC
    readings are small-signal, then read again by transient runs (`transient_ac`) on the
    units `transient` names: "nonlinear" (those `nonlinear` finds), "all" or "none";
    default eval/bench.yaml `transient.units`. `stats`, if given, counts the units
    `checked`, those read by `transient`, their `readings` and the `unsettled`."""
    obs = case.observables
    ac = [j for j, ob in enumerate(obs) if ob.kind == "ac"]
    tr = bench()["transient"]
    mode = transient or tr["units"]
    if mode not in ("nonlinear", "all", "none"):
        raise ValueError(f"transient mode {mode!r}: use nonlinear, all or none")
    if not ac or case.signal is None:
        mode = "none"
    check = tuple(int(e) for e in tr["check_ends"]) if mode == "nonlinear" else ()
    power_up(units, jobs)
    tagged = run_decks_tags([measure_script(u, obs, check) for u in units],
                            [len(obs)] * len(units), jobs)
    res = [r["@@"] for r in tagged]
    if mode == "none":
        return res
    todo = [k for k, r in enumerate(res) if all(math.isfinite(v) for v in r)]
    if mode == "nonlinear":
        if stats is not None:
            stats["checked"] = stats.get("checked", 0) + len(todo)
        todo = [k for k in todo if nonlinear(tagged[k], ac, len(check))]
    tran = transient_ac(case, [units[k] for k in todo], ac, jobs, stats)
    for k, t in zip(todo, tran, strict=True):
        for j in ac:
            res[k][j] = t[j]
    return res


def power_up(units: list[BenchUnit], jobs: int | None = None) -> None:
    """Set each unit's `nodeset` to the state it is in once powered (unit.power_up_deck);
    a unit whose run gave no answer keeps none."""
    decks = [power_up_deck(u) for u in units]
    got = run_decks_tags([d for d, _ in decks], [len(n) for _, n in decks], jobs)
    for u, (_, nodes), r in zip(units, decks, got, strict=True):
        vals = r.get("@p", [])
        if len(vals) == len(nodes) and all(math.isfinite(v) for v in vals):
            u.nodeset = dict(zip(nodes, vals, strict=True))


def _tagged(r: dict[str, list[float]], tag: str, j: int) -> float:
    """Value `j` a deck echoed under `tag`, NaN if it echoed none."""
    row = r.get(tag)
    return row[j] if row is not None else math.nan


def nonlinear(r: dict[str, list[float]], ac: list[int], n_check: int) -> bool:
    """Whether a unit's small-signal deck (`measure_script` with `check`, every meter
    idle) shows it departing from small-signal behaviour: at some ac point the check
    run's windows have not `settled`, or the last is more than eval/bench.yaml
    `transient.linear_rel` (+ `settled_abs`) from the small-signal reading. In a linear
    circuit superposition makes the two the same; a stage that clips, a junction driven
    by more than a few millivolts, one that the tone's peaks turn on, make them differ."""
    tr = bench()["transient"]
    rel, floor = float(tr["linear_rel"]), float(tr["settled_abs"])
    for j in ac:
        vals = [_tagged(r, f"@c{k}", j) for k in range(n_check)]
        small = _tagged(r, "@~", j)
        if not settled(vals) or not abs(vals[-1] - small) <= rel * abs(small) + floor:
            return True
    return False


def settled(vals: list[float]) -> bool:
    """Whether successive windows' readings (volts rms) agree: each within eval/bench.yaml
    `transient.settled_rel` of the last, or `settled_abs`; False if any is not finite."""
    tr = bench()["transient"]
    tol = float(tr["settled_rel"]) * abs(vals[-1]) + float(tr["settled_abs"])
    return (all(math.isfinite(v) for v in vals)
            and all(abs(b - a) <= tol for a, b in zip(vals, vals[1:], strict=False)))


def transient_ac(case: Case, units: list[BenchUnit], which: list[int],
                 jobs: int | None = None, stats: dict | None = None
                 ) -> list[dict[int, float]]:
    """The ac observables `which` of each unit read by `unit.transient_script` with the
    meter connected (volts rms, AC-coupled, over whole periods), run by run through
    eval/bench.yaml `transient.runs`: a reading goes on to the next, longer run while its
    windows have not `settled` (coupling capacitors still charging to where the clipped
    or rectified waveform holds them). The last window of the last run taken is kept;
    one still moving at the end of the last run is counted in `stats["unsettled"]`, with
    its last two windows' relative difference in `stats["unsettled_max"]`."""
    tr = bench()["transient"]
    obs = case.observables
    runs = [tuple(int(e) for e in ends) for ends in tr["runs"]]
    out: list[dict[int, float]] = [{} for _ in units]
    pending = [(k, list(which)) for k in range(len(units))]
    st = stats if stats is not None else {}
    st["transient"] = st.get("transient", 0) + len(units)
    for n, ends in enumerate(runs):
        if not pending:
            break
        st["readings"] = st.get("readings", 0) + sum(len(js) for _, js in pending)
        res = run_decks_tags([transient_script(units[k], obs, js, ends)
                              for k, js in pending], [len(obs)] * len(pending), jobs,
                             timeout=300.0)
        left = []
        for (k, js), r in zip(pending, res, strict=True):
            again = []
            for j in js:
                vals = [_tagged(r, f"@t{m}", j) for m in range(len(ends))]
                out[k][j] = vals[-1]
                if not math.isfinite(vals[-1]) or settled(vals):
                    continue
                if n + 1 < len(runs):
                    again.append(j)
                else:
                    st["unsettled"] = st.get("unsettled", 0) + 1
                    st["unsettled_max"] = max(st.get("unsettled_max", 0.0), abs(
                        vals[-1] - vals[-2]) / max(abs(vals[-1]), 1e-12))
            if again:
                left.append((k, again))
        pending = left
    return out


def mark_masked(case: Case, units: list[GenUnit], jobs: int | None = None,
                transient: str | None = None, stats: dict | None = None) -> None:
    """For two-fault units: when the unit reads, at every observable, within the meter's
    stated accuracy of one member fault alone (same unit, same fault values), the other
    fault is hidden; the detail then ends with `masked: reads as <fault> alone`."""
    obs = case.observables
    alone = [(g, f, v) for g in units for f, v in g.alone]
    res = measure_benches(case, [v for _, _, v in alone], jobs, transient, stats)
    for (g, f, _), r in zip(alone, res, strict=True):
        if "masked:" in g.detail:
            continue
        if all(math.isfinite(a) and abs(t - a) <= meterlike.bound(a, ob.kind, ob.unit,
                                                                 case.meter)
               for t, a, ob in zip(g.true, r, obs, strict=True)):
            g.detail += f"; masked: reads as {f} alone"


def display(case: Case, g: GenUnit) -> None:
    """Apply the meter (calibration, noise, rounding, overload) and any blunder."""
    rng = np.random.default_rng([g.seed, 1])
    meter = case.meter
    err = meterlike.MeterErrors.draw(meter, rng)
    g.shown = [meterlike.show(v, ob.kind, ob.unit, meter, err, rng)
               for v, ob in zip(g.true, case.observables, strict=True)]
    if g.set == "blunder":
        g.detail = "; ".join(x for x in (g.detail, _blunder(case, g, rng)) if x)


def _blunder(case: Case, g: GenUnit, rng: np.random.Generator) -> str:
    """Replace one reading by a mistake a person makes at the bench; return what."""
    obs = case.observables
    meter = case.meter
    kinds = list(bench()["blunder"]["kinds"])
    for _ in range(50):
        j = int(rng.integers(len(obs)))
        old = g.shown[j]
        if old is None:
            continue
        kind = kinds[rng.integers(len(kinds))]
        new = _mistake(kind, old, j, g, obs, meter, rng)
        res = meterlike.resolution(old, obs[j].kind, obs[j].unit, meter) or 0.0
        if new is None or abs(new - old) < 0.1 * abs(old) + 10 * res:
            continue
        g.shown[j] = new
        return f"blunder at {obs[j].point} {obs[j].kind}: {kind}, {old:g} written as {new:g}"
    return "blunder: none possible"


def _mistake(kind, old, j, g, obs, meter, rng) -> float | None:
    ob = obs[j]
    if kind == "decimal":
        return old * (10.0 if rng.random() < 0.5 else 0.1)
    if kind == "zero":
        return 0.0
    if kind == "slipped":
        others = [i for i, o in enumerate(obs) if i != j and o.kind == ob.kind
                  and o.unit == ob.unit and g.shown[i] is not None and o.point != ob.point]
        return g.shown[others[rng.integers(len(others))]] if others else None
    if kind == "transposed":
        t = meterlike.text(old, ob.kind, ob.unit, meter)
        digits = [i for i, ch in enumerate(t) if ch.isdigit()]
        pairs = [(a, b) for a, b in zip(digits, digits[1:], strict=False)
                 if b == a + 1 and t[a] != t[b]]
        if not pairs:
            return None
        a, b = pairs[rng.integers(len(pairs))]
        t2 = t[:a] + t[b] + t[a] + t[b + 1:]
        return float(t2)
    raise ValueError(kind)


def generate_case(case: Case, plan_: list[tuple[str, str | None]], seed: int,
                  jobs: int | None = None, retries: int = 3, transient: str | None = None,
                  stats: dict | None = None) -> tuple[list[GenUnit], int]:
    """Build, simulate and display every planned unit. A unit ngspice cannot solve is
    redrawn (new seed) up to `retries` times, then dropped; returns (units, dropped).
    `transient` and `stats` as in `measure_benches`."""
    seeds = np.random.SeedSequence(seed).generate_state(len(plan_) * (retries + 1))
    units = [build(case, w, int(seeds[i])) for i, w in enumerate(plan_)]
    measure(case, units, jobs, transient, stats)
    dropped = 0
    for attempt in range(1, retries + 1):
        bad = [i for i, g in enumerate(units) if not all(math.isfinite(v) for v in g.true)]
        if not bad:
            break
        for i in bad:
            units[i] = build(case, plan_[i], int(seeds[attempt * len(plan_) + i]))
        measure(case, [units[i] for i in bad], jobs, transient, stats)
    keep = []
    for g in units:
        if all(math.isfinite(v) for v in g.true):
            keep.append(g)
        else:
            dropped += 1
    mark_masked(case, [g for g in keep if g.alone], jobs, transient, stats)
    for g in keep:
        display(case, g)
    order = np.random.default_rng([seed, 2]).permutation(len(keep))
    width = max(4, len(str(len(keep))))
    out = [keep[i] for i in order]
    for n, g in enumerate(out, 1):
        g.id = f"U{n:0{width}d}"
    return out, dropped


def write(case: Case, units: list[GenUnit], out: Path) -> tuple[Path, Path]:
    """Write DIR/<case>-batch.csv and DIR/<case>-truth.csv; return their paths."""
    out.mkdir(parents=True, exist_ok=True)
    stem = Path(case.path).stem
    bpath, tpath = out / f"{stem}-batch.csv", out / f"{stem}-truth.csv"
    obs = case.observables
    with bpath.open("w", newline="", encoding="utf-8") as fh:
        w = csv.writer(fh, lineterminator="\n")
        w.writerow(["unit", "point", "kind", "value"])
        for g in units:
            for v, ob in zip(g.shown, obs, strict=True):
                if v is not None:
                    w.writerow([g.id, ob.point, ob.kind,
                                meterlike.text(v, ob.kind, ob.unit, case.meter)])
    with tpath.open("w", newline="", encoding="utf-8") as fh:
        w = csv.writer(fh, lineterminator="\n")
        w.writerow(["unit", "fault", "set", "detail"])
        for g in sorted(units, key=lambda g: g.id):
            w.writerow([g.id, g.fault, g.set, g.detail])
    return bpath, tpath


def bundled_cases() -> list[Path]:
    return sorted(cases_dir().glob("*.yaml"))


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(prog="python -m eval.generate", description=__doc__.split(
        "\n\n")[0])
    ap.add_argument("--case", action="append", help="case file (repeatable; default: all "
                    "bundled cases)")
    ap.add_argument("--out", required=True, help="output folder")
    ap.add_argument("--units", type=int, help="a mixed triage batch of N units per case")
    ap.add_argument("--per-fault", type=int, default=2)
    ap.add_argument("--healthy", type=int, default=20)
    ap.add_argument("--blunder", type=int, default=20)
    ap.add_argument("--unmodelled", type=int, default=30)
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--jobs", type=int, default=None)
    ap.add_argument("--transient", choices=("nonlinear", "all", "none"),
                    help="which units have their AC readings taken by transient runs: "
                         "those that do not behave linearly (eval/bench.yaml default), "
                         "all, or none (small-signal only, as before)")
    a = ap.parse_args(argv)
    if ngspice_path() is None:
        print("eval.generate: ngspice is not on PATH; install it to generate units",
              file=sys.stderr)
        return 1
    rules = load_rules()
    manifest = {"seed": a.seed, "cases": {}}
    for path in a.case or bundled_cases():
        case = load_case(str(path), rules)
        # a case's units depend on the seed and the case's name only, not on which other
        # cases are generated alongside
        key = [a.seed, zlib.crc32(Path(case.path).stem.encode())]
        rng = np.random.default_rng(key)
        p = (plan_mix(case, rng, a.units) if a.units else
             plan(case, rng, a.per_fault, a.healthy, a.blunder, a.unmodelled))
        seed = int(np.random.SeedSequence(key).generate_state(1)[0])
        stats: dict = {}
        units, dropped = generate_case(case, p, seed=seed, jobs=a.jobs,
                                       transient=a.transient, stats=stats)
        b, t = write(case, units, Path(a.out))
        counts = {s: sum(g.set == s for g in units) for s in
                  ("healthy", "fault", "blunder", "unmodelled")}
        manifest["cases"][str(Path(path).resolve())] = {
            "batch": b.name, "truth": t.name, "units": counts, "dropped": dropped,
            "transient": stats}
        tr = ""
        if "checked" in stats:
            tr = (f"; AC by transient on {stats.get('transient', 0)} of {stats['checked']} "
                  f"units checked, {stats.get('readings', 0)} reading runs")
            if stats.get("unsettled"):
                tr += (f", {stats['unsettled']} reading(s) still moving at the end (last "
                       f"window by up to {100 * stats['unsettled_max']:.1f} %)")
        print(f"{Path(str(path)).name}: {len(units)} units ({counts}), {dropped} dropped"
              f"{tr} -> {b}", file=sys.stderr)
    (Path(a.out) / "manifest.json").write_text(json.dumps(manifest, indent=2) + "\n",
                                               encoding="utf-8")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
