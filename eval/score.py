"""Score diag's engine on generated units (the batch and truth files of eval.generate).

    python -m eval.score DIR [--guided-per-fault N] [--draws K] [--failures N] [--hindsight]

For every unit: the engine diagnoses it with every reading taken ("all points"), and in
guided mode it starts from no reading and takes the first proposed `next` reading each
time, against taking the points in case order, until the truth's group reaches p >= 0.9.
With --hindsight it also finds, for each guided run, the fewest of the unit's readings
that put p >= 0.9 on the truth's group when chosen knowing the truth and every reading
(a search over subsets): no policy that reads one point at a time can do better, so the
ratio of these to case order bounds the guided ratio from below (minutes, not seconds).

Groups: hypotheses sharing a `group` number cannot be told apart by any offered reading, so
their probabilities are summed and a hit on any member is a group-aware hit.
"""

from __future__ import annotations

import argparse
import csv
import json
import math
import os
import sys
from collections import defaultdict
from concurrent.futures import ProcessPoolExecutor
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from diag.core import readings
from diag.core.case import Case, load_case
from diag.core.engine import Diagnosis, Engine, Reading
from diag.core.rules import load_rules

CONFIDENT = 0.9          # "confident": stated probability at or above this
BINS = np.linspace(0.0, 1.0, 11)
TARGETS = {"top1_group": 0.90, "group_size": 2.0, "top3_group": 0.98,
           "wrong_confident": 0.02, "flagged": 0.80, "false_alarm": 0.05, "ece": 0.10,
           "guided_ratio": 0.5}


@dataclass
class UnitScore:
    """What the engine said about one unit, against its truth."""

    case: str
    unit: str
    set: str
    truth: str
    detail: str
    fits: bool
    top: str
    top_p: float
    modelled: bool                  # the truth is one of the engine's hypotheses
    top1: bool = False
    top1_group: bool = False
    top3: bool = False
    top3_group: bool = False
    top_group_p: float = 0.0
    top_group_size: int = 0
    truth_p: float = 0.0            # summed over the truth's group
    truth_group_size: int = 0       # the truth's group as `diag faults` lists it
    guided: int | None = None       # readings taken to reach p >= 0.9 on the truth group
    in_order: int | None = None     # the same taking points in case order
    hindsight: int | None = None    # fewest readings, chosen in hindsight (--hindsight)
    n_readings: int = 0
    rejected: int = 0               # rows of the unit that diag's readings parser refused
    handled: bool = False           # unmodelled: flagged, or the exact pair ranked first
    extra: dict = field(default_factory=dict)


def read_batch(path: Path, case: Case, rules=None) -> tuple[dict[str, list[Reading]],
                                                             dict[str, int]]:
    """Readings per unit from a `unit,point,kind,value` batch, through diag's own readings
    parser (as `diag triage` reads it), and the rows it rejected per unit."""
    rf = readings.parse_file(path, case, rules)
    units = {u: list(r) for u, r in rf.units.items()}
    rejected: dict[str, int] = defaultdict(int)
    for e in rf.errors:
        rejected[rf.row_units.get(e.line or 0, "?")] += 1
    return units, dict(rejected)


def read_truth(path: Path) -> dict[str, dict]:
    with path.open(encoding="utf-8", newline="") as fh:
        return {r["unit"]: r for r in csv.DictReader(fh)}


def groups_of(d: Diagnosis) -> tuple[dict[str, int], dict[int, float], dict[int, int]]:
    """(group of each fault id, summed p per group, members per group)."""
    gid = {s.fault: s.group for s in d.suspects}
    gp: dict[int, float] = defaultdict(float)
    gn: dict[int, int] = defaultdict(int)
    for s in d.suspects:
        gp[s.group] += s.p
        gn[s.group] += 1
    return gid, dict(gp), dict(gn)


def truth_group_p(d: Diagnosis, truth: str) -> float:
    gid, gp, _ = groups_of(d)
    return gp.get(gid[truth], 0.0) if truth in gid else 0.0


def score_unit(eng: Engine, case: Case, unit: str, readings: list[Reading], t: dict,
               guided: bool) -> UnitScore:
    d = eng.diagnose(readings)
    gid, gp, gn = groups_of(d)
    truth = t["fault"]
    ranked_groups = sorted(gp, key=lambda g: -gp[g])
    top = d.suspects[0]
    top_g = ranked_groups[0]
    modelled = truth in gid
    s = UnitScore(case=Path(case.path).stem, unit=unit, set=t["set"], truth=truth,
                  detail=t.get("detail", ""), fits=bool(d.fits), top=top.fault,
                  top_p=float(top.p), modelled=modelled, top_group_p=float(gp[top_g]),
                  top_group_size=int(gn[top_g]), n_readings=len(readings))
    pv = (d.extra or {}).get("p_value")
    if isinstance(pv, (int, float)):
        s.extra["p_value"] = float(pv)
    if modelled:
        tg = gid[truth]
        s.top1 = top.fault == truth
        s.top1_group = tg == top_g
        s.top3 = truth in [x.fault for x in d.suspects[:3]]
        s.top3_group = tg in ranked_groups[:3]
        s.truth_p = float(gp[tg])
        if t["set"] in ("fault", "healthy"):
            s.truth_group_size = listed_group_size(eng, truth)
    else:
        s.extra["pair_in_top3"] = truth in [x.fault for x in d.suspects[:3]]
    s.handled = (not s.fits) or (modelled and s.top1_group)
    if guided and modelled and t["set"] == "fault":
        s.guided, s.in_order = _guided(eng, case, readings, truth)
    return s


def listed_group_size(eng: Engine, fault: str) -> int:
    """Members of `fault`'s group as `diag faults` lists it (groups formed in prior
    order, from the offered readings alone): the reference a unit's top group is set
    against (groups formed in posterior order can differ by a few members either way)."""
    ens = eng.ensemble
    ids = [h.id for h in ens.hypotheses]
    g = ens.group[ids.index(fault)]
    return int(sum(x == g for x in ens.group))


def _guided(eng: Engine, case: Case, readings: list[Reading], truth: str
            ) -> tuple[int, int]:
    """Readings needed to reach p >= CONFIDENT on the truth's group: following the
    engine's first proposal, and taking points in case order. A run that never gets
    there counts every reading the unit has."""
    have = {(r.point, r.kind): r for r in readings}
    n_all = len(have)

    taken: list[Reading] = []
    guided = n_all
    while True:
        d = eng.diagnose(taken)
        if truth_group_p(d, truth) >= CONFIDENT:
            guided = len(taken)
            break
        done = {(r.point, r.kind) for r in taken}
        nxt = [n for n in d.next if (n.point, n.kind) in have and (n.point, n.kind) not in done]
        if not nxt:
            left = [k for k in have if k not in done]
            if not left:
                break
            nxt_key = left[0]
        else:
            nxt_key = (nxt[0].point, nxt[0].kind)
        taken.append(have[nxt_key])

    order = [have[(o.point, o.kind)] for o in case.observables if (o.point, o.kind) in have]
    in_order = n_all
    for k in range(len(order) + 1):
        if truth_group_p(eng.diagnose(order[:k]), truth) >= CONFIDENT:
            in_order = k
            break
    return guided, in_order


def hindsight(eng: Engine, readings: list[Reading], truth: str, cap: int) -> int:
    """Fewest of `readings` that put p >= CONFIDENT on the truth's group, the subset
    chosen knowing the truth (every subset of size 0, 1, ... tried); `cap` when none
    smaller than `cap` does (the caller passes a count it knows suffices, or every
    reading)."""
    import itertools

    for k in range(min(cap, len(readings))):
        for sub in itertools.combinations(readings, k):
            if truth_group_p(eng.diagnose(list(sub), advise=False), truth) >= CONFIDENT:
                return k
    return cap


def score_case(folder: Path, case_path: str, info: dict, guided_per_fault: int = 1,
               draws: int = 128, with_hindsight: bool = False) -> list[UnitScore]:
    """Score one case's units. The guided runs take the first `guided_per_fault` units
    of each fault (in unit order); 0 skips them. `with_hindsight` adds the hindsight
    count to each guided run (`hindsight`)."""
    rules = load_rules()
    case = load_case(case_path, rules)
    eng = Engine(case, rules, K=draws, seed=0)
    eng.build()
    batch, rejected = read_batch(folder / info["batch"], case, rules)
    truth = read_truth(folder / info["truth"])
    seen: dict[str, int] = defaultdict(int)
    out = []
    for unit in sorted(truth):
        t = truth[unit]
        seen[t["fault"]] += 1
        g = t["set"] == "fault" and seen[t["fault"]] <= guided_per_fault
        s = score_unit(eng, case, unit, batch.get(unit, []), t, g)
        s.rejected = rejected.get(unit, 0)
        if with_hindsight and s.guided is not None:
            s.hindsight = hindsight(eng, batch.get(unit, []), t["fault"],
                                    min(s.guided, s.in_order))
        out.append(s)
    return out


def score_dir(folder: Path, guided_per_fault: int = 1, draws: int = 128, log=None,
              jobs: int | None = None, with_hindsight: bool = False,
              cases: list[str] | None = None) -> list[UnitScore]:
    """Score every case listed in `folder`/manifest.json (or those whose file name
    without .yaml is in `cases`), one process per case (at most `jobs` at once, default
    the CPU count)."""
    manifest = json.loads((folder / "manifest.json").read_text(encoding="utf-8"))
    items = [(cp, info) for cp, info in manifest["cases"].items()
             if not cases or Path(cp).stem in cases]
    if not items:
        raise SystemExit(f"no case of {folder} is named {', '.join(cases or [])}: the "
                         f"folder holds {', '.join(Path(c).stem for c in manifest['cases'])}")
    jobs = min(jobs or os.cpu_count() or 1, len(items))
    out: list[UnitScore] = []
    if jobs <= 1:
        for cp, info in items:
            out += score_case(folder, cp, info, guided_per_fault, draws, with_hindsight)
            if log:
                log(f"scored {Path(cp).name}")
        return out
    with ProcessPoolExecutor(max_workers=jobs) as pool:
        futs = [pool.submit(score_case, folder, cp, info, guided_per_fault, draws,
                            with_hindsight)
                for cp, info in items]
        for (cp, _), f in zip(items, futs, strict=True):
            out += f.result()
            if log:
                log(f"scored {Path(cp).name}")
    return out


# ---------------------------------------------------------------- summary

def masked(s: UnitScore) -> bool:
    """A two-fault unit that reads like one of its faults alone (see eval.generate)."""
    return s.set == "unmodelled" and "masked:" in s.detail


def _visible(s: UnitScore) -> str:
    """The member fault a masked two-fault unit reads as."""
    return s.detail.split("masked: reads as ")[-1].split()[0]


def unmodelled_kind(s: UnitScore) -> str:
    """bridge, swapped or double: the kind of an unmodelled-set unit (eval.inject)."""
    return ("bridge" if s.truth.startswith("bridge:") else
            "swapped" if s.truth.endswith(":ce-swapped") else "double")


def _mean(xs) -> float:
    xs = list(xs)
    return float(np.mean(xs)) if xs else float("nan")


def summarise(scores: list[UnitScore]) -> dict:
    """Every headline figure over a list of unit scores."""
    mod = [s for s in scores if s.set in ("fault", "healthy") and s.modelled]
    blu = [s for s in scores if s.set == "blunder" and s.modelled]
    unm = [s for s in scores if s.set == "unmodelled" and not masked(s)]
    conf = mod + blu
    g = [s for s in scores if s.guided is not None]
    rel = reliability(conf)
    out = {
        "units": len(scores),
        "modelled": len(mod),
        "top1": _mean(s.top1 for s in mod),
        "top1_group": _mean(s.top1_group for s in mod),
        "group_size": _mean(s.top_group_size for s in mod),
        "top3": _mean(s.top3 for s in mod),
        "top3_group": _mean(s.top3_group for s in mod),
        "wrong_confident": _mean(s.top_group_p >= CONFIDENT and not s.top1_group
                                 for s in conf),
        "blunder_top3_group": _mean(s.top3_group for s in blu),
        "blunder_flagged": _mean(not s.fits for s in blu),
        "flagged": _mean(s.handled for s in unm),
        "flagged_strict": _mean(not s.fits for s in unm),
        # the same without the swapped transistors (diag models them: ce-swapped)
        "flagged_outside": _mean(s.handled for s in unm if unmodelled_kind(s) != "swapped"),
        "masked": sum(masked(s) for s in scores),
        "false_alarm": _mean(not s.fits for s in mod),
        "ece": rel["ece"],
        "mean_gap": rel["mean_gap"],
        "guided": _mean(s.guided for s in g),
        "in_order": _mean(s.in_order for s in g),
        "truth_missing": sorted({f"{s.case}:{s.truth}" for s in scores
                                 if not s.modelled and s.set != "unmodelled"}),
    }
    out["guided_ratio"] = (out["guided"] / out["in_order"]
                           if g and out["in_order"] > 0 else float("nan"))
    # where the figures come from: group sizes per set, and the guided runs split by
    # outcome (a run whose truth never reaches p >= CONFIDENT counts every reading on
    # both sides)
    fault = [s for s in mod if s.set == "fault"]
    healthy = [s for s in mod if s.set == "healthy"]
    out["group_size_fault"] = _mean(s.top_group_size for s in fault)
    out["group_size_healthy"] = _mean(s.top_group_size for s in healthy)
    out["group_size_floor"] = (_mean([1] * len(fault) + [s.top_group_size for s in healthy])
                               if mod else float("nan"))
    out["group_size_listed"] = _mean(s.truth_group_size for s in mod)
    out["group_size_listed_fault"] = _mean(s.truth_group_size for s in fault)
    def never(s: UnitScore) -> bool:
        return s.guided == s.in_order == s.n_readings and s.truth_p < CONFIDENT

    rest = [s for s in g if not never(s)]
    out["guided_counts"] = (sum(s.guided < s.in_order for s in g),
                            sum(s.guided == s.in_order for s in g),
                            sum(s.guided > s.in_order for s in g), len(g) - len(rest))
    out["guided_ratio_reached"] = (sum(s.guided for s in rest) / sum(s.in_order for s in rest)
                                   if rest and sum(s.in_order for s in rest) else float("nan"))
    # the hindsight bound (--hindsight): the same ratios with the fewest readings chosen
    # knowing the truth in place of the guided count
    hs = [s for s in g if s.hindsight is not None]
    hr = [s for s in hs if not never(s)]
    out["hindsight_ratio"] = (sum(s.hindsight for s in hs) / sum(s.in_order for s in hs)
                              if hs and sum(s.in_order for s in hs) else float("nan"))
    out["hindsight_ratio_reached"] = (
        sum(s.hindsight for s in hr) / sum(s.in_order for s in hr)
        if hr and sum(s.in_order for s in hr) else float("nan"))
    return out


def reliability(scores: list[UnitScore]) -> dict:
    """Stated p of the top group against how often it held the truth, per p bin.
    `ece` is the count-weighted mean |gap|, `mean_gap` the plain mean over filled bins."""
    rows = []
    n_all = len(scores)
    ece = 0.0
    for lo, hi in zip(BINS[:-1], BINS[1:], strict=True):
        inb = [s for s in scores if lo <= s.top_group_p < hi or (hi == 1.0 and
                                                                s.top_group_p >= 1.0)]
        if not inb:
            continue
        stated = _mean(s.top_group_p for s in inb)
        seen = _mean(s.top1_group for s in inb)
        rows.append((lo, hi, len(inb), stated, seen))
        ece += len(inb) / n_all * abs(stated - seen)
    gaps = [abs(r[3] - r[4]) for r in rows]
    return {"rows": rows, "ece": ece if rows else float("nan"),
            "mean_gap": _mean(gaps)}


def _pct(x: float) -> str:
    return "n/a" if x != x else f"{100 * x:.1f} %"


def _num(x: float, f: str = ".2f") -> str:
    return "n/a" if x != x else format(x, f)


def markdown(scores: list[UnitScore]) -> str:
    """The results table (per case and overall), the reliability table and the misses."""
    cases = sorted({s.case for s in scores})
    head = ("| case | units | top-1 | top-1 (group) | top group size | top-3 | top-3 (group) "
            "| wrong, p ≥ 0.9 | unmodelled flagged | false alarms | calibration error "
            "| guided readings | case-order readings |")
    lines = [head, "|" + "---|" * 13]

    def row(name, ss):
        m = summarise(ss)
        lines.append(
            f"| {name} | {m['units']} | {_pct(m['top1'])} | {_pct(m['top1_group'])} | "
            f"{_num(m['group_size'])} | {_pct(m['top3'])} | {_pct(m['top3_group'])} | "
            f"{_pct(m['wrong_confident'])} | {_pct(m['flagged'])} | {_pct(m['false_alarm'])}"
            f" | {_num(m['ece'], '.3f')} | {_num(m['guided'], '.1f')} | "
            f"{_num(m['in_order'], '.1f')} |")

    for c in cases:
        row(c, [s for s in scores if s.case == c])
    row("**all**", scores)
    t = TARGETS
    lines.append(f"| target | | | ≥ {t['top1_group']:.0%} | ≤ {t['group_size']:.0f} | | "
                 f"≥ {t['top3_group']:.0%} | ≤ {t['wrong_confident']:.0%} | "
                 f"≥ {t['flagged']:.0%} | ≤ {t['false_alarm']:.0%} | ≤ {t['ece']} | "
                 f"≤ {t['guided_ratio']:.1f} × case order | |")
    m = summarise(scores)
    lines += ["", f"Blunder units (one reading mis-taken): truth's group in the top 3 "
              f"{_pct(m['blunder_top3_group'])}, flagged as not fitting "
              f"{_pct(m['blunder_flagged'])}. Guided/case-order ratio "
              f"{_num(m['guided_ratio'])}. Plain mean |gap| over bins "
              f"{_num(m['mean_gap'], '.3f')}."]
    lines.append(f"Top group size: {_num(m['group_size_fault'])} on faulty units, "
                 f"{_num(m['group_size_healthy'])} on healthy ones (faults no offered "
                 f"reading sees join a healthy unit's group); were every faulty unit's group "
                 f"a single hypothesis, the mean would be {_num(m['group_size_floor'])}; "
                 f"were every unit's top group exactly the truth's group as `diag faults` "
                 f"lists it, {_num(m['group_size_listed'])} "
                 f"({_num(m['group_size_listed_fault'])} on faulty units).")
    if not math.isnan(m["guided_ratio"]):
        a, b, c, n = m["guided_counts"]
        lines.append(f"Guided runs: fewer readings than case order in {a}, as many in {b}, "
                     f"more in {c}; in {n} the truth's group never reaches p ≥ "
                     f"{CONFIDENT} (each counts every reading on both sides); over the "
                     f"others the ratio is {_num(m['guided_ratio_reached'])}.")
    if not math.isnan(m.get("hindsight_ratio", float("nan"))):
        lines.append(f"Hindsight bound: the fewest readings that reach p ≥ {CONFIDENT}, "
                     f"chosen knowing the truth, give {_num(m['hindsight_ratio'])} of case "
                     f"order ({_num(m['hindsight_ratio_reached'])} over the runs that "
                     f"get there); no policy choosing one reading at a time does better.")
    refused = defaultdict(int)
    for s in scores:
        refused[s.set] += s.rejected
    lines.append("Rows refused by diag's readings parser, per set: " + ", ".join(
        f"{k} {v}" for k, v in sorted(refused.items())) + ".")
    if m["truth_missing"]:
        lines.append("Truths the engine has no hypothesis for: "
                     + ", ".join(m["truth_missing"]) + ".")
    lines += ["", "Fault set by mode:", "",
              "| mode | units | top-1 (group) | top-3 (group) | wrong, p ≥ 0.9 |",
              "|---|---|---|---|---|"]
    modes = defaultdict(list)
    for s in scores:
        if s.set == "fault" and s.modelled:
            modes[s.truth.split(":")[-1]].append(s)
    for k, ss in sorted(modes.items()):
        lines.append(f"| {k} | {len(ss)} | {_pct(_mean(x.top1_group for x in ss))} | "
                     f"{_pct(_mean(x.top3_group for x in ss))} | "
                     f"{sum(x.top_group_p >= CONFIDENT and not x.top1_group for x in ss)} |")
    lines += ["", "Reliability (stated p of the top group against observed accuracy):", "",
              "| stated p bin | units | mean stated p | observed accuracy | gap |",
              "|---|---|---|---|---|"]
    conf = [s for s in scores if s.set in ("fault", "healthy", "blunder") and s.modelled]
    for lo, hi, n, stated, seen in reliability(conf)["rows"]:
        lines.append(f"| {lo:.1f}–{hi:.1f} | {n} | {stated:.3f} | {seen:.3f} | "
                     f"{stated - seen:+.3f} |")
    pv = defaultdict(list)
    for s in scores:
        if "p_value" in s.extra:
            pv[s.set].append(s.extra["p_value"])
    if pv:
        lines += ["", "Goodness of fit the engine reported (its `p_value`), median and 10th "
                  "percentile per set: " + "; ".join(
                      f"{k} {np.median(v):.3f} / {np.percentile(v, 10):.3f}"
                      for k, v in sorted(pv.items())) + "."]
    lines += ["", "Unmodelled units flagged (`fits` false), by kind:", ""]
    lines.append(f"Bridges and doubles alone (a swapped transistor is a mode diag models, "
                 f"`ce-swapped`): {_pct(m['flagged_outside'])} flagged or named exactly.")
    lines.append("")
    kinds = defaultdict(list)
    for s in scores:
        if s.set == "unmodelled":
            kinds[unmodelled_kind(s)].append(s)
    for k, ss in sorted(kinds.items()):
        hid = [s for s in ss if masked(s)]
        vis = [s for s in ss if not masked(s)]
        lines.append(f"- {k}: {sum(not s.fits for s in vis)} of {len(vis)} flagged; "
                     f"{sum(s.handled and s.fits for s in vis)} more named exactly (the "
                     f"truth ranked first: a pair, or a mode diag models)" + (
                         f"; plus {len(hid)} where one fault hides the other (the unit reads "
                         f"within meter accuracy of one fault alone; not in the headline), "
                         f"{sum(not s.fits for s in hid)} of them flagged, "
                         f"{sum(s.top == _visible(s) for s in hid)} with the visible fault "
                         f"ranked first" if hid else ""))
    return "\n".join(lines) + "\n"


def failures(scores: list[UnitScore], n: int = 40) -> str:
    """The misses, for the engine engineer: modelled units whose truth's group was not
    ranked first, confident wrong answers, false alarms and unflagged unmodelled units."""
    out = ["| case | unit | set | truth | top suspect (p) | its group p | truth group p | fits "
           "| why listed |", "|---|---|---|---|---|---|---|---|---|"]
    k = 0
    for s in scores:
        why = []
        if s.modelled and s.set in ("fault", "healthy") and not s.top1_group:
            why.append("missed")
        if (s.modelled and s.set != "unmodelled" and s.top_group_p >= CONFIDENT
                and not s.top1_group):
            why.append("confident wrong")
        if s.modelled and s.set in ("fault", "healthy") and not s.fits:
            why.append("false alarm")
        if s.set == "unmodelled" and not s.handled and not masked(s):
            why.append("unmodelled not flagged")
        if not why:
            continue
        k += 1
        if k > n:
            continue
        out.append(f"| {s.case} | {s.unit} | {s.set} | {s.truth} | {s.top} ({s.top_p:.2f}) "
                   f"| {s.top_group_p:.2f} | {s.truth_p:.2f} | {s.fits} | {', '.join(why)} |")
    if k > n:
        out.append(f"| … {k - n} more | | | | | | | | |")
    return "\n".join(out) + "\n"


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(prog="python -m eval.score", description=__doc__.split(
        "\n\n")[0])
    ap.add_argument("folder", help="folder written by eval.generate")
    ap.add_argument("--guided-per-fault", type=int, default=1,
                    help="units per fault given the guided runs (0: none)")
    ap.add_argument("--draws", type=int, default=128, help="engine draws per hypothesis")
    ap.add_argument("--failures", type=int, default=40, help="misses to list")
    ap.add_argument("--hindsight", action="store_true",
                    help="also find each guided run's fewest readings chosen in hindsight")
    ap.add_argument("--case", action="append", metavar="NAME",
                    help="score only this case of the folder (its file name without "
                         ".yaml); may be given more than once")
    a = ap.parse_args(argv)
    scores = score_dir(Path(a.folder), guided_per_fault=a.guided_per_fault, draws=a.draws,
                       log=lambda m: print(m, file=sys.stderr), with_hindsight=a.hindsight,
                       cases=a.case)
    print(markdown(scores))
    print(failures(scores, a.failures))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
