"""Drills: a hidden unit with one fault, simulated meter readings, a score, class results.

A `Drill` is a run of one or more exercises for one trainee. Each exercise (`Round`) draws
its unit once, from a Generator seeded by the exercise, through `Engine.simulate`: part
tolerances and fault parameters are drawn once, so every reading of that exercise comes
from the same unit, and each reading is what the case's meter shows (meter error and
display resolution included). Same case, fault and seed give the same unit.

The score (`Score`) says whether the named fault is the hidden one or one the offered
readings cannot tell from it (same group), how many readings the trainee used against
how many diag's own next-reading advice needs for that unit, and which readings would
have told the most. Class results go to a CSV (`RESULT_FIELDS`); `summarise` reads such
files back and says who needs which kind of practice.

Volts at voltage points, amperes at supply points, seconds for times.
"""

from __future__ import annotations

import csv
import datetime as _dt
import secrets
import time
from collections.abc import Callable, Iterable, Sequence
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from diag.core.advise import format_bits
from diag.core.case import SEMICONDUCTORS, Case
from diag.core.engine import Diagnosis, Engine, Reading
from diag.core.errors import DiagError

# diag's advice is followed until its leading group holds this much probability; the same
# stopping rule the evaluation's guided mode uses (eval/score.py: p >= 0.9 on one group).
P_DONE = 0.9
# A trainee who takes more than this many times the readings diag's advice needs is
# flagged as over-reading in the class summary (a teaching choice, not a physical limit).
OVERREAD_RATIO = 1.5
# How many readings the score lists as the ones that would have told the most.
N_TELLING = 3
# diag's advice is replayed on the drawn unit this many times, each with a fresh meter
# error, and the readings it needed are averaged.
ADVICE_REPLAYS = 5
# A drawn unit the solver cannot settle is drawn again from the same Generator (so the
# seed still fixes the unit), at most this many times.
DRAW_TRIES = 5

RESULT_FIELDS = ("trainee", "exercise", "correct", "readings_used", "seconds", "case",
                 "fault", "seed", "named", "same_group", "advice_readings", "part_family",
                 "mode_class", "finished")


@dataclass(frozen=True)
class Exercise:
    """One exercise: a case file, a fault id (None: drawn by the priors) and a seed."""

    case: str
    fault: str | None = None
    seed: int | None = None
    name: str = ""


@dataclass(frozen=True)
class Unit:
    """A drawn unit: its fault, the model's reading at every observable (loading
    included, meter error excluded; volts or amperes, case order) and what the meter
    showed there."""

    fault: str
    truth: np.ndarray
    shown: tuple[Reading, ...]


def _spec(engine: Engine, fault_id: str):
    from diag.core import faults

    for s in engine.specs:
        if s.id == fault_id:
            return s
    return faults.parse_fault_id(engine.case, engine.rules, fault_id)


def draw_unit(engine: Engine, fault_id: str, rng: np.random.Generator) -> Unit:
    """Draw one unit with this fault (tolerances and fault values once, then the meter
    error of each reading), in the same order of draws as Engine.simulate: the same
    Generator state gives the same readings as `diag simulate`."""
    from diag.core import ensemble, meter, solver

    circ = engine.circuit
    obs = engine.case.observables
    params = ensemble.draw_unit(circ, _spec(engine, fault_id), 1, rng,
                                engine.inf.get("ambient"))
    dc = solver.solve_dc(circ, params)
    ac = solver.solve_ac(circ, params, dc) if any(o.kind == "ac" for o in obs) else None
    x = np.asarray(meter.observe(circ, params, dc, ac, obs, engine.case.meter)[0], float)
    if not np.all(np.isfinite(x)):
        why = next((w for w in dc.why if w), "the circuit did not solve")
        raise DiagError(f"{fault_id}: {why}", file=engine.case.path,
                        hint="try another seed")
    return Unit(fault_id, x, show(engine, x, rng))


def show(engine: Engine, truth: np.ndarray, rng: np.random.Generator) -> tuple[Reading, ...]:
    """What the case's meter shows for the model readings `truth` (M,): meter error drawn
    within its stated accuracy, rounded to the display resolution."""
    from diag.core import meter

    m = engine.case.meter
    return tuple(Reading(o.point, o.kind, float(meter.display(np.array([truth[j]]), o.kind, m,
                                                              o.unit, rng)[0]))
                 for j, o in enumerate(engine.case.observables))


@dataclass(frozen=True)
class Telling:
    """A reading that would have told much: (point, kind) and why, in words."""

    point: str
    kind: str
    why: str


@dataclass(frozen=True)
class Score:
    """The outcome of one exercise.

    `correct` is true when the named fault is the hidden one or in its group (the offered
    readings cannot tell them apart; `same_group` says which). `advice_readings` is the
    mean number of readings diag's own advice took on this unit until one group held
    P_DONE (or nothing was left to learn), over ADVICE_REPLAYS fresh meter errors;
    `advice_fault` is where the advice ended on the readings the trainee saw.
    """

    truth: str
    truth_text: str
    named: str
    named_text: str
    correct: bool
    same_group: bool
    readings_used: int
    advice_readings: float
    advice_fault: str
    advice_p: float
    telling: tuple[Telling, ...]
    seconds: float


def fault_family(case: Case, fault_id: str) -> tuple[str, str]:
    """(part family, mode class) of a fault id, for the class summary.

    Part family: `junction` for diodes, LEDs, zeners and transistors, `resistor` for
    resistors and pots, `capacitor` for both capacitor kinds, otherwise the part kind;
    `multiple` for a multiple fault, `healthy` for the healthy unit. Mode class: `open`,
    `short`, or `drift` (a value off or a part fitted wrong: high, low, leaky, low-beta,
    reversed, ce-swapped, ...).
    """
    if fault_id == "healthy":
        return "healthy", "healthy"
    members = fault_id.split("+")
    if len(members) > 1:
        return "multiple", "multiple"
    ref, _, mode = fault_id.partition(":")
    try:
        kind = case.part(ref).kind
    except KeyError:
        raise DiagError(f"fault {fault_id!r} names no part of the case", file=case.path,
                        where=ref, hint="use a fault id listed by `diag faults`") from None
    if kind in SEMICONDUCTORS:
        family = "junction"
    elif kind in ("resistor", "pot"):
        family = "resistor"
    elif kind in ("capacitor", "electrolytic"):
        family = "capacitor"
    else:
        family = kind
    if "open" in mode or mode == "dead":
        cls = "open"
    elif "short" in mode:
        cls = "short"
    else:
        cls = "drift"
    return family, cls


def pick_fault(engine: Engine, rng: np.random.Generator) -> str:
    """A fault id drawn by the hypotheses' priors (`healthy` excluded)."""
    hyps = [h for h in engine.ensemble.hypotheses if h.id != "healthy"]
    if not hyps:
        raise DiagError("the case has no fault hypotheses to drill", file=engine.case.path,
                        hint="check rules/faults.yaml covers the case's part kinds")
    p = np.array([max(h.prior, 0.0) for h in hyps], dtype=float)
    p = p / p.sum() if p.sum() > 0 else np.full(len(hyps), 1.0 / len(hyps))
    return hyps[int(rng.choice(len(hyps), p=p))].id


def _group_of(engine: Engine) -> dict[str, int]:
    ens = engine.ensemble
    return {h.id: int(g) for h, g in zip(ens.hypotheses, ens.group, strict=True)}


def _top_group(d: Diagnosis) -> tuple[str, float]:
    """Leading suspect and the probability held by its group."""
    top = d.suspects[0]
    return top.fault, float(sum(s.p for s in d.suspects if s.group == top.group))


def follow_advice(engine: Engine, unit: dict[tuple[str, str], Reading]
                  ) -> tuple[list[tuple[str, str, float]], Diagnosis]:
    """Take readings of `unit` in the order diag's `next` advice gives, from none, until
    the leading group holds P_DONE or nothing is left to learn. Returns the readings taken
    as (point, kind, bits when advised) and the last diagnosis."""
    taken: list[Reading] = []
    steps: list[tuple[str, str, float]] = []
    d = engine.diagnose(taken)
    while _top_group(d)[1] < P_DONE:
        nxt = [n for n in d.next if (n.point, n.kind) in unit
               and all((r.point, r.kind) != (n.point, n.kind) for r in taken)]
        if not nxt:
            break
        n = nxt[0]
        taken.append(unit[(n.point, n.kind)])
        steps.append((n.point, n.kind, float(n.bits)))
        d = engine.diagnose(taken)
    return steps, d


def _fmt(x: float, unit: str) -> str:
    from diag.core.values import format_value

    return format_value(x, unit)


def telling_readings(engine: Engine, truth: str, named: str,
                     steps: Sequence[tuple[str, str, float]]) -> tuple[Telling, ...]:
    """The readings that would have told the most. When the named fault is another one,
    the observables whose predicted bands under the two faults lie furthest apart (in
    units of their combined half-widths, each widened by two meter standard deviations);
    otherwise the first readings diag advised."""
    from diag.core import meter

    m = engine.case.meter
    units = {(o.point, o.kind): o.unit for o in engine.case.observables}
    if named != truth and named in _group_of(engine):
        bt = {(b.observable.point, b.observable.kind): b for b in engine.bands(truth)}
        bn = {(b.observable.point, b.observable.kind): b for b in engine.bands(named)}
        scored = []
        for key, a in bt.items():
            b = bn.get(key)
            if b is None or not np.isfinite([a.mid, b.mid]).all():
                continue
            sig = meter.sigma(np.array([a.mid, b.mid]), key[1], m, units[key])
            width = (a.high - a.low) / 2 + (b.high - b.low) / 2 + 2.0 * float(np.sum(sig))
            sep = abs(a.mid - b.mid) / max(width, 1e-12)
            scored.append((sep, key, a, b))
        scored.sort(key=lambda t: -t[0])
        out = []
        for sep, key, a, b in scored[:N_TELLING]:
            if sep <= 1.0:
                break
            u = units[key]
            out.append(Telling(key[0], key[1],
                               f"{truth}: {_fmt(a.mid, u)}; {named}: {_fmt(b.mid, u)}"))
        if out:
            return tuple(out)
    return tuple(Telling(p, k, f"diag's advice, {format_bits(bits)} expected")
                 for p, k, bits in steps[:N_TELLING])


@dataclass
class Round:
    """One exercise in progress: the hidden unit (every observable's displayed reading,
    drawn once), the readings the trainee has asked for, and the score once named."""

    exercise: Exercise
    engine: Engine
    truth: str
    drawn: Unit
    seed: int = 0
    clock: Callable[[], float] = time.monotonic
    taken: list[Reading] = field(default_factory=list)
    started: float = 0.0
    score: Score | None = None

    @classmethod
    def start(cls, exercise: Exercise, engine: Engine,
              clock: Callable[[], float] = time.monotonic) -> Round:
        """Draw the fault (if not given) and the unit from the exercise's seed (a fresh
        seed, kept in `seed` so the unit can be replayed, when the exercise has none)."""
        seed = exercise.seed if exercise.seed is not None else secrets.randbelow(2**31)
        rng = np.random.default_rng(seed)
        groups = _group_of(engine)
        truth = exercise.fault or pick_fault(engine, rng)
        if truth not in groups:
            raise DiagError(f"unknown fault {truth!r}", file=engine.case.path,
                            hint="list the case's faults with `diag faults CASE`")
        for attempt in range(DRAW_TRIES):
            try:
                unit = draw_unit(engine, truth, rng)
                break
            except DiagError:  # the solver could not settle this draw: draw again
                if attempt == DRAW_TRIES - 1:
                    raise
        return cls(exercise, engine, truth, unit, seed=seed, clock=clock, started=clock())

    @property
    def unit(self) -> dict[tuple[str, str], Reading]:
        """(point, kind) -> the reading the meter shows there."""
        return {(r.point, r.kind): r for r in self.drawn.shown}

    @property
    def case(self) -> Case:
        return self.engine.case

    def offered(self) -> tuple[tuple[str, str], ...]:
        """Every (point, kind) the trainee may ask for, in case order."""
        return tuple((o.point, o.kind) for o in self.case.observables)

    def read(self, point: str, kind: str = "dc") -> Reading:
        """The meter reading at (point, kind), as the meter shows it. Asking again for a
        reading already taken returns it without counting it twice."""
        if self.score is not None:
            raise DiagError("this exercise is already scored", hint="go on to the next one")
        key = (point, kind)
        if key not in self.unit:
            offered = ", ".join(f"{p} {k}" for p, k in self.offered())
            raise DiagError(f"no {kind} reading is offered at {point}", file=self.case.path,
                            where=point, hint=f"offered: {offered}")
        for r in self.taken:
            if (r.point, r.kind) == key:
                return r
        r = self.unit[key]
        stamped = Reading(r.point, r.kind, r.value, row=None,
                          time=_dt.datetime.now(_dt.UTC).isoformat(timespec="seconds"))
        self.taken.append(stamped)
        return stamped

    def ranking(self) -> Diagnosis:
        """diag's ranking on the readings taken so far (shown only when hints are on)."""
        return self.engine.diagnose(self.taken)

    def name(self, fault_id: str) -> Score:
        """Score the trainee's answer `fault_id` (a fault id of the case, or `healthy`)."""
        if self.score is not None:
            return self.score
        groups = _group_of(self.engine)
        named = fault_id.strip()
        if named not in groups:
            raise DiagError(f"unknown fault {named!r}", file=self.case.path,
                            hint="name a fault id such as R2:open; `diag faults` lists them")
        seconds = self.clock() - self.started
        steps, last = follow_advice(self.engine, self.unit)
        advice_fault, advice_p = _top_group(last)
        counts = [len(steps)]
        for r in range(1, ADVICE_REPLAYS):
            rng = np.random.default_rng([self.seed, r])
            again = {(x.point, x.kind): x for x in show(self.engine, self.drawn.truth, rng)}
            counts.append(len(follow_advice(self.engine, again)[0]))
        same = named != self.truth and groups[named] == groups[self.truth]
        hyp = self.engine.hypothesis
        self.score = Score(
            truth=self.truth, truth_text=hyp(self.truth).text,
            named=named, named_text=hyp(named).text,
            correct=named == self.truth or same, same_group=same,
            readings_used=len(self.taken), advice_readings=float(np.mean(counts)),
            advice_fault=advice_fault, advice_p=advice_p,
            telling=telling_readings(self.engine, self.truth, named, steps),
            seconds=float(seconds))
        return self.score

    def result_row(self, trainee: str) -> dict[str, str]:
        """One CSV row (RESULT_FIELDS) of the scored exercise."""
        s = self.score
        if s is None:
            raise DiagError("the exercise has not been scored yet",
                            hint="name a fault first")
        family, cls = fault_family(self.case, s.truth)
        return {
            "trainee": trainee, "exercise": self.exercise.name, "correct": str(int(s.correct)),
            "readings_used": str(s.readings_used), "seconds": f"{s.seconds:.1f}",
            "case": self.case.path, "fault": s.truth, "seed": str(self.seed),
            "named": s.named,
            "same_group": str(int(s.same_group)), "advice_readings": f"{s.advice_readings:.1f}",
            "part_family": family, "mode_class": cls,
            "finished": _dt.datetime.now(_dt.UTC).isoformat(timespec="seconds"),
        }


class Drill:
    """A run of exercises for one trainee. `engines(case_path)` gives the Engine of a case
    (the caller caches them). Scored rounds are appended to `results` (a CSV path) if given.
    `hints` allows the ranking to be shown while an exercise runs."""

    def __init__(self, exercises: Sequence[Exercise], engines: Callable[[str], Engine], *,
                 trainee: str = "", hints: bool = False, results: str | None = None,
                 clock: Callable[[], float] = time.monotonic):
        if not exercises:
            raise DiagError("no exercises to run", hint="give a case, or an exercises file")
        self.exercises = tuple(exercises)
        self.engines = engines
        self.trainee = trainee or "trainee"
        self.hints = hints
        self.results = results
        self.clock = clock
        self.index = 0
        self.done: list[Round] = []
        self.round = self._start(0)

    def _start(self, i: int) -> Round:
        ex = self.exercises[i]
        return Round.start(ex, self.engines(ex.case), clock=self.clock)

    @property
    def finished(self) -> bool:
        """True once the last exercise has been scored."""
        return self.index == len(self.exercises) - 1 and self.round.score is not None

    def name(self, fault_id: str) -> Score:
        """Score the current exercise and record its result."""
        first = self.round.score is None
        score = self.round.name(fault_id)
        if first:
            self.done.append(self.round)
            if self.results:
                append_result(self.results, self.round.result_row(self.trainee))
        return score

    def next_round(self) -> Round | None:
        """Go on to the next exercise (the current one must be scored); None at the end."""
        if self.round.score is None:
            raise DiagError("name a fault before going on", hint="the exercise is not scored")
        if self.index + 1 >= len(self.exercises):
            return None
        self.index += 1
        self.round = self._start(self.index)
        return self.round


def append_result(path: str, row: dict[str, str]) -> None:
    """Append one result row to a class results CSV, writing the header if it is new."""
    p = Path(path)
    new = not p.exists() or p.stat().st_size == 0
    with p.open("a", encoding="utf-8", newline="") as fh:
        w = csv.DictWriter(fh, fieldnames=RESULT_FIELDS)
        if new:
            w.writeheader()
        w.writerow({k: row.get(k, "") for k in RESULT_FIELDS})
        fh.flush()


def load_exercises(path: str, default_case: str | None = None) -> tuple[Exercise, ...]:
    """Read an exercises YAML file:

        exercises:
          - {name: warm-up, case: sounder-driver.yaml, fault: R2:open, seed: 11}
          - {case: ../cases/x.yaml, seed: 3}          # fault drawn by the priors

    `case` is a path relative to the file, or the name of a bundled case (with or
    without `.yaml`); it may be left out when `default_case` is given. Raises DiagError
    naming the file and line of a bad entry.
    """
    from diag.core.yamlio import load_yaml_file

    data = load_yaml_file(path)
    items = data.get("exercises") if isinstance(data, dict) else None
    if not isinstance(items, list) or not items:
        raise DiagError("expected a list under `exercises:`", file=path, line=1,
                        hint="see examples/exercises.yaml")
    base = Path(path).resolve().parent
    out = []
    for i, item in enumerate(items):
        line = getattr(item, "line", None) or data.line_of("exercises")
        if not isinstance(item, dict):
            raise DiagError("each exercise is a mapping with case, fault and seed", file=path,
                            line=line, where=f"exercise {i + 1}")
        unknown = set(item) - {"name", "case", "fault", "seed"}
        if unknown:
            raise DiagError(f"unknown field {sorted(unknown)[0]!r}", file=path, line=line,
                            where=f"exercise {i + 1}", hint="use name, case, fault, seed")
        case = item.get("case", default_case)
        if not case:
            raise DiagError("missing `case`", file=path, line=line, where=f"exercise {i + 1}",
                            hint="give a case file path or a bundled case name")
        seed = item.get("seed")
        if seed is not None and (isinstance(seed, bool) or not isinstance(seed, int)
                                 or seed < 0):
            raise DiagError(f"seed {seed!r} is not a whole number >= 0", file=path,
                            line=line, where=f"exercise {i + 1}")
        fault = item.get("fault")
        if fault is not None and (not isinstance(fault, str) or not fault.strip()):
            raise DiagError(f"fault {fault!r} is not a fault id", file=path, line=line,
                            where=f"exercise {i + 1}", hint="e.g. R2:open, or leave it out")
        if fault in ("random", "any"):
            fault = None
        out.append(Exercise(case=_resolve_case(str(case), base),
                            fault=fault.strip() if fault else None, seed=seed,
                            name=str(item.get("name") or f"exercise {i + 1}")))
    return tuple(out)


def _resolve_case(case: str, base: Path) -> str:
    """A case named in an exercise file: relative to that file's folder first, then as
    case.find_case resolves it (a path, or a user or bundled case name)."""
    from diag.core.case import find_case

    rel = base / case
    return str(rel if rel.is_file() else find_case(case))


# ---- class summary -----------------------------------------------------------------


@dataclass(frozen=True)
class TraineeSummary:
    """One trainee's record: exercises, right answers, misses by part family and by mode
    class (each as (misses, tried)), readings used against diag's advice."""

    trainee: str
    exercises: int
    correct: int
    by_family: dict[str, tuple[int, int]]
    by_mode: dict[str, tuple[int, int]]
    readings_used: int
    advice_readings: float
    early_misses: int
    needs: tuple[str, ...]


def read_results(paths: Iterable[str]) -> list[dict[str, str]]:
    """Rows of one or more class results CSVs. Raises DiagError on a missing column."""
    rows: list[dict[str, str]] = []
    for path in paths:
        try:
            fh = open(path, encoding="utf-8", newline="")
        except FileNotFoundError:
            raise DiagError("file not found", file=path,
                            hint="give the CSV written by `diag drill --results`") from None
        with fh:
            reader = csv.DictReader(fh)
            missing = [c for c in ("trainee", "correct", "readings_used", "advice_readings",
                                   "part_family", "mode_class") if c not in (reader.fieldnames
                                                                             or [])]
            if missing:
                raise DiagError(f"missing column {missing[0]!r}", file=path, line=1,
                                hint="the header must be: " + ",".join(RESULT_FIELDS))
            for n, row in enumerate(reader, start=2):
                try:
                    row["_correct"] = bool(int(row["correct"]))
                    row["_used"] = int(row["readings_used"])
                    row["_advice"] = float(row["advice_readings"])
                except (TypeError, ValueError):
                    raise DiagError("correct and readings_used must be whole numbers, "
                                    "advice_readings a number", file=path, line=n) from None
                rows.append(row)
    return rows


def summarise(rows: Sequence[dict]) -> list[TraineeSummary]:
    """Per trainee (in order of first appearance): misses by part family and mode class,
    and what to practise. A family or class is named when at least one exercise of it was
    missed, worst miss rate first; over-reading when the readings used exceed
    OVERREAD_RATIO times what diag's advice needed; naming too early when misses came
    with fewer readings than the advice needed."""
    order: dict[str, list[dict]] = {}
    for r in rows:
        order.setdefault(r["trainee"], []).append(r)
    out = []
    for who, rs in order.items():
        fam: dict[str, list[int]] = {}
        mode: dict[str, list[int]] = {}
        for r in rs:
            for table, key in ((fam, r["part_family"]), (mode, r["mode_class"])):
                t = table.setdefault(key, [0, 0])
                t[0] += 0 if r["_correct"] else 1
                t[1] += 1
        used = sum(r["_used"] for r in rs)
        advice = sum(r["_advice"] for r in rs)
        early = sum(1 for r in rs if not r["_correct"] and r["_used"] < r["_advice"])
        needs = []
        for table in (fam, mode):
            for key, (miss, tried) in sorted(table.items(),
                                             key=lambda kv: (-kv[1][0] / kv[1][1], kv[0])):
                if miss:
                    needs.append(f"{key} faults: missed {miss} of {tried}")
        if advice and used > OVERREAD_RATIO * advice:
            needs.append(f"over-reading: {used} readings where diag's advice needed "
                         f"{advice:.0f}")
        if early:
            needs.append(f"naming too early: {early} miss(es) with fewer readings than "
                         "the advice needed")
        out.append(TraineeSummary(
            trainee=who, exercises=len(rs), correct=sum(r["_correct"] for r in rs),
            by_family={k: (v[0], v[1]) for k, v in fam.items()},
            by_mode={k: (v[0], v[1]) for k, v in mode.items()},
            readings_used=used, advice_readings=advice, early_misses=early,
            needs=tuple(needs)))
    return out
