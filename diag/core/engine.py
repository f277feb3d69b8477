"""The façade the command line and the interface share: one Engine per (case, rules).

CONTRACT (stable; other modules code against it):

    eng = Engine(case, rules=None, K=128, seed=0)
    eng.build(progress=None, cancelled=None) -> Ensemble     # cached on disk; progress(f)
                                                             # gets 0..1, cancelled() -> bool
    eng.ensemble -> Ensemble                                 # builds on first use
    eng.build_further(progress=None, cancelled=None)         # every hypothesis's further
                                                             # units now (else on demand)
    eng.diagnose(readings, healthy_prior=None) -> Diagnosis
    eng.bands(fault_id="healthy") -> tuple[Band, ...]        # predicted band per observable
    eng.hypothesis(fault_id) -> Hypothesis
    eng.simulate(fault_id, rng) -> tuple[Reading, ...]       # one drawn unit, every
                                                             # observable, meter error and
                                                             # display resolution applied
    Diagnosis.to_json(case_path, top=None) -> dict           # SPEC section 5

Readings are matched to observables by (point, kind).

Also: eng.case, eng.rules, eng.check_value(point, kind, text) -> float (the readings
file's validation for one typed value; DiagError with the reason), eng.splitters() (for
each group of several hypotheses, the kind of reading that would split it),
eng.groups_for(order) (group numbers formed around the leading suspects, as diagnose
numbers them). Many units at once: diag.core.triage.rank_batch(eng, units) gives each
the Diagnosis `diagnose` would (vectorised across units; to rounding).

Groups: Ensemble.group numbers hypotheses greedily by prior (what `diag faults` lists);
a Diagnosis forms its groups greedily by posterior, so the leading group is built around
the leading suspect (same pairwise rule, infer.apart).
"""

from __future__ import annotations

import contextlib
import math
import os
import threading
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from typing import Any, NamedTuple

import numpy as np

from diag.core.case import Case, Observable
from diag.core.errors import DiagError


@dataclass(frozen=True)
class Hypothesis:
    """One explanation of the unit: `healthy`, a single fault `R2:open`, or a multiple
    fault `Q3:ce-short+R9:open`. `prior` is normalised over the hypothesis set (with the
    default healthy prior). `origin`: healthy, single, linked or pair."""

    id: str
    prior: float
    text: str
    confirm: str
    parts: tuple[str, ...] = ()
    origin: str = "single"


@dataclass(frozen=True)
class Ensemble:
    """Predicted meter readings of K drawn units per hypothesis.

    samples: (H, K, M) float64, meter reading at each observable (loading included,
    meter error excluded), volts or amperes; NaN where a variant did not converge.
    group: (H,) int, hypotheses no offered reading can tell apart share a number.
    noise_a, noise_b: (M,) reading noise sigma(y) = sqrt(b^2 + (a y)^2) (infer.Noise).
    ref: random numbers of the goodness-of-fit reference (ensemble.reference_draws).
    hidden: readings nobody offers yet (DC and AC at every node, supply currents) as
    (H, 2, X) lower/upper band per hypothesis with their names, for `splitters`.
    failed: (H,) count of units that did not converge.
    """

    case_hash: str
    rules_hash: str
    observables: tuple[Observable, ...]
    hypotheses: tuple[Hypothesis, ...]
    samples: np.ndarray
    group: np.ndarray
    noise_a: np.ndarray | None = None
    noise_b: np.ndarray | None = None
    ref: dict = field(default_factory=dict)
    hidden_names: tuple[str, ...] = ()
    hidden_band: np.ndarray | None = None
    failed: np.ndarray | None = None
    from_cache: bool = False


@dataclass(frozen=True)
class Reading:
    """One meter reading: volts (amperes at a supply point). `row` is the file row it
    came from (1-based, header = row 1), `time` an ISO timestamp when typed in."""

    point: str
    kind: str
    value: float
    row: int | None = None
    time: str | None = None


@dataclass(frozen=True)
class Band:
    """Predicted reading at one observable under one hypothesis: about the 1st, 50th and
    99th percentile over the drawn units (volts or amperes)."""

    observable: Observable
    low: float
    mid: float
    high: float


class Suspect(NamedTuple):
    """One ranked hypothesis of a Diagnosis: fault id, posterior p, group number, text.
    A named tuple (immutable like the other result types): a diagnosis holds one per
    hypothesis and a batch triage builds about a million of them, about four times
    faster than a frozen dataclass."""

    fault: str
    p: float
    group: int
    text: str


@dataclass(frozen=True)
class NextReading:
    point: str
    kind: str
    bits: float
    why: str


@dataclass(frozen=True)
class Diagnosis:
    """The answer for one unit (SPEC section 5). `suspects` holds every hypothesis,
    sorted by p. `fit_text` says in plain words how well the best one explains the
    readings; `rejected` lists readings not used, each with its reason. `extra` holds
    `p_value` (goodness of fit of the best hypothesis), `pairs_tried`, `confirm`
    (fault -> bench confirmation of the leading suspects)."""

    readings_used: int
    fits: bool
    suspects: tuple[Suspect, ...]
    next: tuple[NextReading, ...]
    notes: tuple[str, ...] = ()
    fit_text: str = ""
    rejected: tuple[str, ...] = ()
    extra: dict = field(default_factory=dict)

    def bench_checks(self, close: float = 0.1, most: int = 3) -> list[tuple[str, str]]:
        """(fault, how to confirm it at the bench) for the leader and each suspect whose
        p is within a factor 1/`close` of the leader's (at most `most`): when the readings
        leave two suspects close, the powered-off check of each tells them apart. None
        before any reading while one can be taken: the ranking is then the priors alone,
        and a reading costs less than lifting parts."""
        confirm = self.extra.get("confirm") or {}
        if not self.suspects or (not self.readings_used and self.next):
            return []
        floor = close * self.suspects[0].p
        return [(s.fault, confirm[s.fault]) for s in self.suspects
                if s.p >= floor and confirm.get(s.fault)][:most]

    def reads_healthy(self) -> bool:
        """True when the leader fits the readings, `healthy` is in the leader's group (no
        offered reading tells the leader from a good unit) and a good unit itself passes
        the goodness-of-fit test on these readings (extra "healthy_fits", set by the
        engine; a group may hold a fault whose mild end reads like a good unit while
        these readings sit at its far end)."""
        if not (self.fits and self.suspects and self.extra.get("healthy_fits", True)):
            return False
        return healthy_leads(self.suspects)

    def lead_p(self) -> float:
        """The probability the leading suspect's group holds (0 with no suspects)."""
        if not self.suspects:
            return 0.0
        top = self.suspects[0].group
        return float(sum(s.p for s in self.suspects if s.group == top))

    def healthy_alike(self, short: bool = False) -> str:
        """A sentence when readings were taken and they read healthy (`reads_healthy`);
        "" otherwise. `short`: a few words, for a narrow panel."""
        if not (self.readings_used and self.reads_healthy()):
            return ""
        if short:
            return "Also fits a good unit: a fault left is one these readings cannot see."
        return ("These readings also fit a good unit: healthy is in the leading group. "
                "If the unit still shows its complaint, the fault is one these readings "
                "cannot see; the bench checks tell which.")

    def to_json(self, case_path: str, top: int | None = None) -> dict[str, Any]:
        """SPEC section 5 object; `top` limits the suspects listed (p still sums to 1
        over all hypotheses)."""
        sus = self.suspects if top is None else self.suspects[:max(top, 0)]
        return {
            "case": case_path,
            "readings_used": self.readings_used,
            "fits": bool(self.fits),
            "suspects": [{"fault": s.fault, "p": round(float(s.p), 6), "group": int(s.group),
                          "text": s.text} for s in sus],
            "next": [{"point": n.point, "kind": n.kind, "bits": round(float(n.bits), 4),
                      "why": n.why} for n in self.next],
            "notes": list(self.notes),
            "fit": {"p_value": _r(self.extra.get("p_value")), "text": self.fit_text},
            "rejected": list(self.rejected),
            "pairs_tried": bool(self.extra.get("pairs_tried", False)),
        }


def _r(x):
    return None if x is None else round(float(x), 4)


def healthy_leads(suspects) -> bool:
    """`healthy` is in the group of the first of `suspects` (Suspect objects)."""
    if not suspects:
        return False
    g = suspects[0].group
    return any(s.fault == "healthy" and s.group == g for s in suspects)


def ids_index(specs, fault_id: str) -> int | None:
    """Index of hypothesis `fault_id` in `specs` (objects with an `id`), None if absent."""
    return next((i for i, sp in enumerate(specs) if sp.id == fault_id), None)


# Bumped when the cached arrays change meaning (the cache key also holds both hashes).
CACHE_VERSION = "e30"
# Most on-demand hypotheses (pairs) kept in the extra cache file (14 kB each at K=128).
EXTRA_KEEP = 2000
# Most hypotheses' further units (Engine._refine) kept in the -more cache file (about
# 43 kB each at K=128, 14 readings).
MORE_KEEP = 600


@dataclass
class _Store:
    """Units solved on demand (Engine._on_demand): K per hypothesis from random stream
    `stream`; mem id -> (spec, samples (K, M)); disk what the cache file holds (the
    `keep` newest); loaded once the file has been read."""

    K: int
    stream: int
    keep: int
    mem: dict = field(default_factory=dict)
    disk: dict = field(default_factory=dict)
    loaded: bool = False
    u: dict = field(default_factory=dict)  # id -> samples in u coordinates (Engine)
# Most units one block of a multi-worker solve holds (Engine._solve): beyond this the
# solver's arrays outgrow the CPU caches. Measured on two forked workers (2026-12-05):
# 384 units per hypothesis, 21 hypotheses a block against 42, mic-preamp 1.65 s against
# 1.80 s, pushpull-output 4.0 against 4.9 s; ensembles of 128 (blocks under the bound)
# are as before, and halving the bound made mic-preamp's slower (0.80 against 0.68 s).
BLOCK_UNITS = 8192
# Most units a solve on threads (where no worker process may be forked: the interface)
# gives one thread: two take the interpreter lock in turn, and below about this size
# the handing over costs more than the second core gives. Measured (2026-12-05, 384
# units each for 12 hypotheses, one thread against two): pushpull-output 0.84 against
# 0.95 s, line-driver 0.15 against 0.20 s, sounder-driver 0.12 against 0.15 s,
# mic-preamp 0.16 both; whole ensembles of 128 (5 000 to 10 600 units) are faster on
# two, down to sounder-driver's 5 120 units at 0.20 s both.
THREAD_MIN_UNITS = 5120
# Most goodness-of-fit references kept in memory (Engine._fit; about R + K*d floats each).
FIT_REF_KEEP = 4096
# Reading kinds' model-error keys in faults.yaml `inference.model_error`.
_MODEL_ERR = {("dc", "V"): ("dc_v", "dc_rel"), ("ac", "V"): ("ac_v", "ac_rel"),
              ("dc", "A"): ("a_abs", "a_rel")}


class Engine:
    """Ensemble, diagnosis, advice and notes for one case (see CONTRACT above)."""

    def __init__(self, case: Case, rules=None, K: int = 128, seed: int = 0):
        from diag.core import faults
        from diag.core.rules import load_rules

        if K < 8:
            raise DiagError(f"--draws {K} is too few", hint="use at least 8 (default 128)")
        self.case = case
        self.rules = rules or load_rules()
        self.K = int(K)
        self.seed = int(seed)
        self.inf = faults.inference(self.rules)
        self._circuit = None
        self._singles = faults.singles(case, self.rules)
        self.specs = faults.hypotheses(case, self.rules, self._stress(), self._singles)
        self._pair_scale = faults.pair_weight_scale(self.rules, self._singles)
        self.observables = case.observables
        self._obs_index = {(o.point, o.kind): j for j, o in enumerate(self.observables)}
        self._ens: Ensemble | None = None
        self._lock = threading.RLock()  # one build at a time (interface worker threads)
        self._active = 0  # diagnoses in progress (build_further's steps give way to them)
        self._active_lock = threading.Lock()
        # units solved on demand (_on_demand): hypotheses outside the built set (pairs),
        # K each; further units of leading suspects (_refine), refine_draws x K each
        self._stores = {"-extra": _Store(self.K, 0, EXTRA_KEEP),
                        "-more": _Store(self.K * int(self.inf["refine_draws"]), 1,
                                        MORE_KEEP)}
        self._limits = None
        self._healthy_bands: tuple[Band, ...] | None = None  # bands()'s, once worked out
        self._signal_warning: str | None = None
        self._stability_warning: str | None = None
        self._ref_slip = None
        self._boxes = None  # infer.boxes of the built hypotheses (groups with pairs)
        self._extra_spread: dict = {}  # kernel spreads of sets with pairs (_spread_for)
        self._lead_text: dict[tuple[str, int], str] = {}  # (fault id, j) -> "id: value"
        self._fit_refs: dict[tuple, Any] = {}  # (fault id, taken, ref, own spread) -> ref

    # -- building ------------------------------------------------------------------------

    def _stress(self) -> dict[str, dict[str, float]]:
        """Watts in each resistor and amperes through each fuse that a linked fault would
        take with its cause, with the cause in place (faults.linked, stress.py): solved
        once per case and rules, then read from a small file in the cache folder (a warm
        start solves nothing)."""
        from diag import __version__
        from diag.core import ensemble, faults, stress

        need = faults.stress_candidates(self.case, self.rules, self._singles)
        if not need:
            return {}
        path = ensemble.cache_file(self.case.hash, self.rules.hash, stress.DRAWS,
                                   stress.SEED, f"{CACHE_VERSION}-{__version__}",
                                   kind="stress")
        got = ensemble.load_json_cache(path)
        try:
            if {c: tuple(r) for c, r in got["need"].items()} == need:
                return {c: {r: float("nan") if x is None else float(x)
                            for r, x in row.items()}
                        for c, row in got["worst"].items()}
        except (KeyError, TypeError, AttributeError, ValueError):
            pass  # missing or not what this version writes: solve again
        specs = {s.id: s for s in self._singles}
        worst = stress.worst(self.circuit, self.case, need, specs)
        try:  # NaN (no unit solved) is written as null and read back as NaN
            ensemble.save_json_cache(path, {"need": need, "worst": {
                c: {r: (x if math.isfinite(x) else None) for r, x in row.items()}
                for c, row in worst.items()}})
        except OSError:
            pass  # a read-only cache folder only costs speed
        return worst

    @property
    def circuit(self):
        if self._circuit is None:
            from diag.core import netlist

            self._circuit = netlist.compile_case(self.case, self.rules)
        return self._circuit

    @property
    def ensemble(self) -> Ensemble:
        if self._ens is None:
            self.build()
        return self._ens

    def _priors(self, healthy_prior: float, specs) -> np.ndarray:
        from diag.core import faults

        return np.array(faults.priors(specs, healthy_prior))

    def _noise(self) -> tuple[np.ndarray, np.ndarray]:
        from diag.core import meter

        me = self.inf["model_error"]
        a = np.empty(len(self.observables))
        b = np.empty(len(self.observables))
        m = self.case.meter
        for j, ob in enumerate(self.observables):
            k_abs, k_rel = _MODEL_ERR[(ob.kind, ob.unit)]
            ranges = np.asarray(m["a_ranges" if ob.unit == "A" else "v_ranges"], float)
            s0 = float(meter.sigma(0.0, ob.kind, m, ob.unit))
            grid = np.geomspace(ranges[0] / 20, ranges[-1] * 0.9, 200)
            s = meter.sigma(grid, ob.kind, m, ob.unit)
            rel = np.median(np.sqrt(np.maximum(s ** 2 - s0 ** 2, 0.0)) / grid)
            a[j] = math.hypot(rel, float(me[k_rel]))
            b[j] = math.hypot(s0, float(me[k_abs]))
        return a, b

    def _solve(self, specs, K: int, progress=None, cancelled=None, chunk: int | None = None,
               threads: int | None = None, processes: bool | None = None, stream: int = 0,
               scores: tuple | None = None, later: bool = False):
        """Meter readings (H, K, M) of K units per spec, and the hidden readings
        (H, K, X) with their names; progress over chunks of hypotheses; `stream` as in
        ensemble.hypothesis_rng. `scores` (noise, z, grid): the units' infer.kernel_scores
        too, worked out beside each chunk's solve (H, C, S), as a fourth result. Chunks are
        solved by `threads` workers (default: the CPU count, at most 2; one for a small
        solve on threads, THREAD_MIN_UNITS), forked processes
        where that is safe, else threads (diag.core.workers; `processes` forces one or the
        other). Every hypothesis draws from its own random stream and the solver keeps
        its work buffers per thread, so the result depends on none of these. Default
        chunk: 16 hypotheses on one worker; with more, one chunk per worker (large
        chunks spend their time in numpy rather than in Python), or as many per worker
        as keep each under BLOCK_UNITS units. With `later` (no progress, no
        cancelling), a workers.Later of the result instead: the work starts now on
        forked processes, where those are used (workers.start)."""
        from diag.core import ensemble, meter, solver, workers

        circ = self.circuit
        need_ac = any(o.kind == "ac" for o in self.observables) or self.case.signal is not None

        if threads is None:
            threads = max(1, min(2, os.cpu_count() or 1))
            if len(specs) * K <= THREAD_MIN_UNITS and not (
                    workers.forkable() if processes is None else processes):
                threads = 1  # see THREAD_MIN_UNITS
        if chunk is None:  # blocks a multiple of the workers, none over BLOCK_UNITS units
            per = max(1, -(-len(specs) * K // (threads * BLOCK_UNITS)))
            chunk = 16 if threads <= 1 else max(1, -(-len(specs) // (threads * per)))
        blocks = [specs[i:i + chunk] for i in range(0, len(specs), chunk)]

        def one(i):
            block = blocks[i]
            params = ensemble.draw_hypotheses(circ, block, K, self.seed,
                                              self.inf.get("ambient"), stream)
            with np.errstate(all="ignore"):  # a failed variant is data (NaN), not an error
                dc = solver.solve_dc(circ, params)
                ac = solver.solve_ac(circ, params, dc) if need_ac else None
                x = meter.observe(circ, params, dc, ac, self.observables, self.case.meter)
            ok = np.asarray(dc.ok, bool)
            cols = [np.asarray(dc.v, float)]
            if ac is not None:
                cols.append(np.abs(np.asarray(ac.v)))
            cols.append(np.asarray(dc.i_supply, float).reshape(len(ok), -1))
            h = np.concatenate(cols, axis=1)
            h[~ok] = np.nan
            x = x.reshape(len(block), K, -1)
            if scores is None:
                return x, h.reshape(len(block), K, -1), None
            from diag.core import infer

            noise, z, grid = scores
            return x, h.reshape(len(block), K, -1), infer.kernel_scores(noise.u(x), z, grid)

        names = [f"dc {n}" for n in circ.nodes]
        if need_ac:
            names += [f"ac {n}" for n in circ.nodes]
        names += [f"current {s}" for s in circ.supplies]

        def assemble(got):
            out = (np.concatenate([g[0] for g in got]), np.concatenate([g[1] for g in got]),
                   tuple(names))
            return out if scores is None else (*out, np.concatenate([g[2] for g in got]))

        if later:
            return workers.start(one, len(blocks), threads, processes).then(assemble)
        ends = np.cumsum([len(b) for b in blocks])
        return assemble(workers.run(one, len(blocks), threads,
                                    None if progress is None
                                    else (lambda i: progress(min(1.0, ends[i] / len(specs)))),
                                    cancelled, processes))

    def build(self, progress: Callable[[float], None] | None = None,
              cancelled: Callable[[], bool] | None = None, in_child: bool = True
              ) -> Ensemble:
        """Build (or load from the disk cache) the ensemble of every hypothesis. Where
        this process may not fork workers but a child could (`workers.fork_in_child`)
        and the solve is not small (THREAD_MIN_UNITS), a cold build runs in a child
        process (diag.core.buildjob) and is read from the cache; should the child fail,
        it runs here (`in_child` False: always here)."""
        with self._lock:
            if in_child and self._ens is None:
                self._build_in_child(progress, cancelled)
            return self._build(progress, cancelled)

    def _build_in_child(self, progress, cancelled) -> None:
        """Run diag.core.buildjob for this case when `build`'s conditions hold and the
        cache holds no ensemble yet; progress from its lines; DiagError when cancelled
        (the child is stopped). Any other failure leaves the build to this process."""
        import queue
        import signal
        import subprocess
        import sys

        import diag
        from diag.core import workers

        path = self._ens_path()
        if (not workers.fork_in_child() or (os.cpu_count() or 1) < 2 or path.exists()
                or len(self.specs) * self.K <= THREAD_MIN_UNITS
                or not os.path.isfile(self.case.path) or not sys.executable):
            return
        cmd = [sys.executable, "-m", "diag.core.buildjob", os.path.abspath(self.case.path),
               self.rules.folder, str(self.K), str(self.seed)]
        # the child imports this very copy of diag, whatever else is installed
        root = os.path.dirname(os.path.dirname(os.path.abspath(diag.__file__)))
        env = dict(os.environ)
        env["PYTHONPATH"] = os.pathsep.join(p for p in (root, env.get("PYTHONPATH")) if p)
        try:
            # a session of its own, so that stopping it stops the workers it forked too
            proc = subprocess.Popen(cmd, stdin=subprocess.DEVNULL, stdout=subprocess.PIPE,
                                    stderr=subprocess.DEVNULL, text=True, env=env,
                                    start_new_session=True)
        except OSError:
            return
        lines: queue.Queue = queue.Queue()

        def read() -> None:
            for line in proc.stdout:
                lines.put(line)
            lines.put(None)

        threading.Thread(target=read, daemon=True).start()
        finished = False
        try:
            while True:
                if cancelled is not None and cancelled():
                    raise DiagError("ensemble build cancelled")
                try:
                    line = lines.get(timeout=0.05)
                except queue.Empty:
                    continue
                if line is None:  # the child closed its output: it has ended
                    finished = True
                    break
                word, _, value = line.partition(" ")
                if word == "progress" and progress is not None:
                    with contextlib.suppress(ValueError):
                        progress(min(float(value), 1.0))
        finally:
            if not finished:
                with contextlib.suppress(OSError):
                    os.killpg(proc.pid, signal.SIGKILL)
            proc.wait()

    def _build(self, progress, cancelled) -> Ensemble:
        from diag.core import ensemble, infer

        if self._ens is not None:
            if progress:
                progress(1.0)
            return self._ens
        path = self._ens_path()
        ids = np.array([s.id for s in self.specs])
        data = ensemble.load_cache(path)
        from_cache = (data is not None and np.array_equal(data.get("ids"), ids)
                      and "kernel_spread" in data)
        a, b = self._noise()
        noise = infer.Noise(a, b)
        default_hp = float(self.inf["healthy_prior"])
        pri = self._priors(default_hp, self.specs)
        # at least 256 reference readings so p-values resolve well below fit_alpha
        R = max(256, self.K * int(self.inf["fit_draws"]))
        ref = ensemble.reference_draws(R, len(self.observables), self.seed,
                                       bool(self.inf["fit_blunders"]))
        if not from_cache:
            from concurrent.futures import ThreadPoolExecutor

            grid = self._kernel_grid()
            samples, hidden, names, scores = self._solve(
                self.specs, self.K, progress, cancelled, scores=(noise, ref["ref_z"], grid))
            U = noise.u(samples)
            q = float(self.inf["group_quantile"])
            with ThreadPoolExecutor(max_workers=1) as pool:  # two numpy jobs side by side
                ap = pool.submit(infer.apart, U, q, float(self.inf["group_sigmas"]),
                                 float(self.inf["group_share"]))
                band = np.moveaxis(infer.nan_quantile(hidden, [q, 1 - q], axis=1), 0, 1)
                ks = infer.kernel_choice(scores, U, infer.blunder_range(U)[1],
                                         float(self.inf["blunder"]), grid)
                data = {"ids": ids, "samples": samples, "hidden_band": band,
                        "hidden_names": np.array(names), "apart": ap.result(),
                        "failed": np.sum(~np.all(np.isfinite(samples), axis=2), axis=1),
                        "kernel_spread": ks}
            try:
                ensemble.save_cache(path, data)
                ensemble.prune_cache(path.parent)
            except OSError:
                pass  # a read-only cache folder only costs speed
        else:
            U = noise.u(data["samples"])
            if progress:
                progress(1.0)
        self._apart = data["apart"]
        grp = infer.groups_from(self._apart, np.argsort(-pri, kind="stable"))
        hyps = tuple(Hypothesis(s.id, float(p), s.text, s.confirm, s.parts, s.origin)
                     for s, p in zip(self.specs, pri, strict=True))
        self._ens = Ensemble(self.case.hash, self.rules.hash, self.observables, hyps,
                             data["samples"], grp, a, b, ref,
                             tuple(str(n) for n in data["hidden_names"]),
                             data["hidden_band"], data["failed"], from_cache)
        self._noise_obj = noise
        self._U = U
        self._blunder = infer.blunder_range(U)
        self._scott = infer.spread(U)
        # the smoothing widths depend on the units and the rules only: kept in the cache
        self._spread = data["kernel_spread"]
        return self._ens

    def _kernel_spread(self, U: np.ndarray) -> np.ndarray:
        """infer.kernel_spread of hypotheses' units U (n, K, M) beyond the built set (pairs),
        u units (n, M), with the built ensemble's reference noise and blunder widths."""
        from diag.core import infer

        return infer.kernel_spread(U, self._ens.ref["ref_z"], self._blunder[1],
                                   float(self.inf["blunder"]), self._kernel_grid())

    def _kernel_grid(self) -> np.ndarray:
        """The kernel factors cross-validation chooses among (rules `kernel_factors`)."""
        return np.array(self.inf["kernel_factors"], dtype=float)

    def _extends_built(self, U: np.ndarray) -> bool:
        """U (H, K, M) is the built hypotheses' units followed by more rows (pairs)."""
        H0 = self._U.shape[0]
        return U.shape[0] > H0 and np.array_equal(U[:H0], self._U, equal_nan=True)

    def _spread_for(self, U: np.ndarray) -> np.ndarray:
        """Kernel spread (H, M) of a hypothesis set U (H, K, M): the built one's, and for
        rows beyond it (pairs) their own, worked out once per set and kept."""
        H0 = self._spread.shape[0]
        if U.shape[0] == H0:
            return self._spread
        key = U.shape[0], hash(U[H0:].tobytes())
        got = self._extra_spread.get(key)
        if got is None:
            if self._extends_built(U):
                got = np.concatenate([self._spread, self._kernel_spread(U[H0:])])
            else:
                got = self._kernel_spread(U)
            if len(self._extra_spread) >= FIT_REF_KEEP:
                self._extra_spread.clear()
            self._extra_spread[key] = got
        return got

    # -- hypotheses ------------------------------------------------------------------------

    def _spec(self, fault_id: str):
        from diag.core import faults

        for s in self.specs:
            if s.id == fault_id:
                return s
        got = self._stores["-extra"].mem.get(fault_id)
        if got is not None:
            return got[0]
        return faults.parse_fault_id(self.case, self.rules, fault_id)

    def hypothesis(self, fault_id: str) -> Hypothesis:
        """The hypothesis with this id (also a multiple fault not in the built set)."""
        ens = self.ensemble
        for h in ens.hypotheses:
            if h.id == fault_id:
                return h
        s = self._spec(fault_id)
        return Hypothesis(s.id, 0.0, s.text, s.confirm, s.parts, s.origin)

    def _ens_path(self):
        """The ensemble's cache file: keyed by the case and rules hashes, K, the seed and
        the code version (ensemble.cache_file)."""
        from diag import __version__
        from diag.core import ensemble

        return ensemble.cache_file(self.case.hash, self.rules.hash, self.K, self.seed,
                                   f"{CACHE_VERSION}-{__version__}")

    def _store_file(self, name: str):
        base = self._ens_path()
        return base.with_name(base.stem + f"{name}.npz")

    def _samples_of(self, specs) -> np.ndarray:
        """Samples (n, K, M) of specs outside the built set (pairs, other multiple
        faults): solved once, kept in memory and in a disk cache beside the ensemble's."""
        return self._on_demand("-extra", specs)

    def build_further(self, progress: Callable[[float], None] | None = None,
                      cancelled: Callable[[], bool] | None = None,
                      chunk: int | None = None) -> None:
        """Solve (or read from the cache) the further units of every built hypothesis
        (`_refine`), so that no later reading waits for them: the interface does this
        once the ensemble is built, in the background (the command line solves them as
        suspects lead, triage all at once for a large batch). With `chunk`, `chunk`
        hypotheses at a time, the most likely first, on one thread (a few hypotheses
        solve faster on one than on two threads taking the interpreter lock in turn:
        bench/tui_bench.py), each step saved to the cache: a diagnosis asked for
        meanwhile (another thread) waits for one step at most and solves what it still
        lacks itself, and no step starts while it runs."""
        self.build()
        specs = list(self.specs)
        if not self.further_pending():
            pass  # all solved or cached already, or no refinement (refine_top 0)
        elif chunk is None:
            self._on_demand("-more", specs, progress, cancelled)
        else:
            pri = self._priors(self.inf["healthy_prior"], specs)
            specs = [specs[i] for i in np.argsort(-pri, kind="stable")]
            n = len(specs)
            for a in range(0, n, chunk):
                b = min(n, a + chunk)
                while self._active and not (cancelled and cancelled()):
                    time.sleep(0.002)  # a diagnosis in progress goes first
                self._on_demand(
                    "-more", specs[a:b],
                    None if progress is None
                    else (lambda f, a=a, b=b: progress((a + f * (b - a)) / n)),
                    cancelled, threads=1)
        if progress:
            progress(1.0)

    def build_further_later(self):
        """`build_further` begun now, as a workers.Later whose `get()` finishes it:
        where the solve runs on forked processes, they are forked here, before threads
        the caller starts next, and solve while it works on what needs no further units
        (triage's first phase)."""
        from diag.core.workers import Later

        self.build()
        if not self.further_pending():
            return Later(lambda: None)
        return self._on_demand("-more", list(self.specs), later=True)

    def further_pending(self) -> int:
        """Built hypotheses whose further units are neither in memory nor in the cache
        file (0 once `build_further` has run, when a past session left them all, or
        when the rules refine nothing: `refine_top` 0)."""
        if int(self.inf["refine_top"]) <= 0:
            return 0
        self.build()
        st = self._stores["-more"]
        with self._lock:
            self._load_store(st, "-more")
            return sum(s.id not in st.mem and s.id not in st.disk for s in self.specs)

    def _load_store(self, st: _Store, name: str) -> None:
        """Read store `name`'s cache file into st.disk, once."""
        from diag.core import ensemble

        if st.loaded:
            return
        st.loaded = True
        data = ensemble.load_cache(self._store_file(name))
        if data is not None and data["samples"].shape[1:] == (st.K, len(self.observables)):
            st.disk = {str(f): x for f, x in zip(data["ids"], data["samples"], strict=True)}

    @contextlib.contextmanager
    def _foreground(self):
        """Counts a diagnosis in progress (`_active`): build_further's steps wait while
        one runs, so that it has the CPU and, once it needs the lock, the next turn at
        it (a lock gives no turn to whoever waited longest)."""
        with self._active_lock:
            self._active += 1
        try:
            yield
        finally:
            with self._active_lock:
                self._active -= 1

    def _on_demand(self, name: str, specs, progress=None, cancelled=None,
                   threads: int | None = None, later: bool = False):
        """Samples (n, store K, M) of specs from store `name` (see __init__): each spec
        solved once (its own random stream), kept in memory and in the store's cache
        file beside the ensemble's (ensemble.COMPANIONS), the `keep` newest; `progress`
        and `cancelled` as in `build`, `threads` as in `_solve`. With `later`, a
        workers.Later of them: what is to be solved starts now (`_solve`'s `later`) and
        is kept when got."""
        st = self._stores[name]
        with self._lock:
            todo = [s for s in specs if s.id not in st.mem]
            if todo:
                self._load_store(st, name)
                for s in todo:
                    if s.id in st.disk:
                        st.mem[s.id] = (s, st.disk[s.id])
                todo = [s for s in todo if s.id not in st.mem]
            if todo and not later:
                x, _, _ = self._solve(todo, st.K, progress, cancelled, threads=threads,
                                      stream=st.stream)
                self._keep(st, name, todo, x)
        if not later:
            return self._stacked(st, specs)
        from diag.core.workers import Later

        if not todo:
            return Later(lambda: self._stacked(st, specs))

        def kept(solved) -> np.ndarray:
            with self._lock:
                self._keep(st, name, todo, solved[0])
            return self._stacked(st, specs)

        return self._solve(todo, st.K, threads=threads, stream=st.stream,
                           later=True).then(kept)

    def _keep(self, st: _Store, name: str, specs, x: np.ndarray) -> None:
        """Store solved samples x (n, K, M) of specs in memory and in `name`'s cache file
        (the `keep` newest; under the lock)."""
        from diag.core import ensemble

        for s, xs in zip(specs, x, strict=True):
            st.mem[s.id] = (s, xs)
            st.disk[s.id] = xs
        keep = list(st.disk.items())[-st.keep:]
        try:
            ensemble.save_cache(self._store_file(name), {
                "ids": np.array([k for k, _ in keep]),
                "samples": np.stack([v for _, v in keep])})
        except OSError:
            pass  # a read-only cache folder only costs speed

    def _stacked(self, st: _Store, specs) -> np.ndarray:
        """The kept samples (n, store K, M) of specs, stacked."""
        M = len(self.observables)
        return np.stack([st.mem[s.id][1] for s in specs]) if specs else \
            np.empty((0, st.K, M))

    def signal_warning(self) -> str:
        """bands.CheckResult.signal_text of the nominal circuit: "" unless the case's
        tone is too big for the small-signal AC predictions (worked out once)."""
        if self._signal_warning is None:
            from diag.core.bands import healthy_bands

            self._signal_warning = healthy_bands(self.case, self.rules, K=0).signal_text()
        return self._signal_warning

    def stability_warning(self) -> str:
        """bands.CheckResult.stability_text of the nominal circuit: "" unless it has two
        switched states or a balance point a real unit leaves (worked out once)."""
        if self._stability_warning is None:
            from diag.core import bands, solver

            circ = self.circuit
            self._stability_warning = bands.stability_text(
                **bands.stability(circ, solver.solve_dc(circ, {})))
        return self._stability_warning

    def bands(self, fault_id: str = "healthy") -> tuple[Band, ...]:
        """About the 1st, 50th and 99th percentile of each observable's reading, as the
        meter shows them (rounded to its display resolution, meter.shown_band): a reading
        the meter shows for a unit inside the band is never off it by rounding alone.
        The healthy band is `diag check`'s (bands.healthy_bands: more draws than the
        ensemble's K, so its tails are steadier), with the nominal reading as middle."""
        from diag.core import meter

        if fault_id == "healthy":
            if self._healthy_bands is None:
                from diag.core.bands import healthy_bands

                out = []
                chk = healthy_bands(self.case, self.rules)
                for o, pb in zip(self.observables, chk.points, strict=True):
                    lo, hi = meter.shown_band(pb.low, pb.high, self.case.meter, o.unit)
                    mid = meter.shown(pb.nominal, self.case.meter, o.unit)
                    out.append(Band(o, float(lo), float(mid), float(hi)))
                self._healthy_bands = tuple(out)
            return self._healthy_bands
        ens = self.ensemble
        ids = [h.id for h in ens.hypotheses]
        if fault_id in ids:
            x = ens.samples[ids.index(fault_id)]
        else:
            x = self._samples_of([self._spec(fault_id)])[0]
        from diag.core import infer

        q = infer.nan_quantile(x, [0.01, 0.5, 0.99], axis=0)
        out = []
        for j, o in enumerate(self.observables):
            lo, hi = meter.shown_band(q[0, j], q[2, j], self.case.meter, o.unit)
            mid = meter.shown(q[1, j], self.case.meter, o.unit)
            out.append(Band(o, float(lo), float(mid), float(hi)))
        return tuple(out)

    def simulate(self, fault_id: str, rng: np.random.Generator) -> tuple[Reading, ...]:
        """One unit with this fault drawn from rng (tolerances, fault values, meter
        error and display resolution): a reading at every observable."""
        from diag.core import ensemble, meter, solver

        spec = self._spec(fault_id)
        circ = self.circuit
        params = ensemble.draw_unit(circ, spec, 1, rng, self.inf.get("ambient"))
        need_ac = any(o.kind == "ac" for o in self.observables)
        with np.errstate(all="ignore"):
            dc = solver.solve_dc(circ, params)
            ac = solver.solve_ac(circ, params, dc) if need_ac else None
            x = meter.observe(circ, params, dc, ac, self.observables, self.case.meter)[0]
        if not np.all(np.isfinite(x)):
            why = next((w for w in dc.why if w), "the circuit did not solve")
            raise DiagError(f"{fault_id}: {why}", file=self.case.path,
                            hint="try another --seed")
        shown = meter.display_unit(x, self.observables, self.case.meter, rng)
        return tuple(Reading(o.point, o.kind, float(v))
                     for o, v in zip(self.observables, shown, strict=True))

    # -- readings ----------------------------------------------------------------------------

    def check_value(self, point: str, kind: str, text) -> float:
        """Validate one typed reading exactly as a readings file row is validated."""
        from diag.core import readings

        if self._limits is None:
            self._limits = readings.limits(self.case, self.rules)
        return readings.check_value(self.case, point, kind, text, self._limits)

    def _match(self, readings: Sequence[Reading]):
        taken: dict[int, float] = {}
        rejected = []
        for r in readings:
            j = self._obs_index.get((r.point, r.kind))
            if j is None:
                rejected.append(f"{r.point} {r.kind}: not an offered reading of this case")
                continue
            if r.value is None or not math.isfinite(float(r.value)):
                rejected.append(f"{r.point} {r.kind}: no value")
                continue
            taken[j] = float(r.value)  # a later reading replaces an earlier one
        idx = np.array(sorted(taken), dtype=int)
        return idx, np.array([taken[j] for j in idx], dtype=float), rejected

    def _score(self, U, specs, idx, u_read, healthy_prior):
        from diag.core import infer

        pri = self._priors(healthy_prior, specs)
        with np.errstate(divide="ignore"):
            lp = np.log(pri)
        lo, W = self._blunder
        sp = self._spread_for(U)
        sc = infer.score(U, idx, u_read, lp, float(self.inf["blunder"]), W, sp)
        if len(idx) and int(self.inf["refine_top"]) > 0:
            ll = self._refine(U, specs, idx, u_read[None], lp, sc.loglik[None])[0]
            sc = infer.Scored(ll, sc.loglik_k, infer.posterior(lp + ll))
        return sc, pri

    def _units(self, U, specs, h: int) -> np.ndarray:
        """Every drawn unit (K + refine_draws x K, M) of hypothesis h of U's rows
        (hypotheses `specs`), u coordinates: U's and the store's further ones."""
        return np.concatenate([U[h], self._further_u([specs[h]])[0]])

    def _further_u(self, specs) -> np.ndarray:
        """The further units (n, refine_draws x K, M) of specs in u coordinates (the
        "-more" store's, converted once per hypothesis and kept)."""
        st = self._stores["-more"]
        todo = [s for s in specs if s.id not in st.u]
        if todo:
            for s, x in zip(todo, self._on_demand("-more", todo), strict=True):
                st.u[s.id] = self._noise_obj.u(x)
        return np.stack([st.u[s.id] for s in specs])

    def _widths(self, U, rows, idx) -> np.ndarray:
        """Kernel widths (len(rows), d) of `score` for hypotheses `rows` of U with the
        readings at idx taken, noise widths (unit noise and the K units' bandwidth)."""
        from diag.core import infer

        bw = infer.bandwidth(U[rows], len(idx), self._spread_for(U)[rows])
        return np.sqrt(1.0 + bw[:, idx] ** 2)

    def _refine(self, U, specs, idx, u_reads: np.ndarray, lp: np.ndarray,
                ll: np.ndarray, units_loglik=None) -> np.ndarray:
        """Log-likelihoods (n, H) of n units' readings u_reads (n, d) at observables
        idx, from U's (ll (n, H), log prior lp (H,)), with each unit's `refine_top`
        leading hypotheses' kernel mixtures taken over their further units too (the
        store's refine_draws x K, at U's kernel widths: infer.pooled). K units in
        several dimensions cover a fault's spread thinly at its edges, where a unit of
        one fault often reads like another's: there the kernel density rests on the few
        units that happen to lie near, and a leading suspect's weight on chance. The
        further units are drawn once per hypothesis (their own random stream), so a
        unit's ranking does not depend on what was scored before it. `units_loglik`
        (default infer.loglik_units, the same arguments and result) computes each
        suspect's mixture over its further units (triage passes its table form)."""
        from diag.core import infer

        units_loglik = units_loglik or infer.loglik_units
        top = int(self.inf["refine_top"])
        key = lp[None] + ll
        lead = np.argsort(-key, axis=1, kind="stable")[:, :top]          # (n, top)
        ok = np.isfinite(np.take_along_axis(key, lead, axis=1))
        need = np.unique(lead[ok])
        if not len(need):
            return ll
        more = self._further_u([specs[h] for h in need])
        eps = float(self.inf["blunder"])
        W = self._blunder[1]
        s = self._widths(U, need, idx)
        n_base = np.all(np.isfinite(U[need]), axis=2).sum(axis=1)
        out = ll.copy()
        for i, h in enumerate(need):
            rows = np.flatnonzero(((lead == h) & ok).any(axis=1))
            llm, n = units_loglik(more[i], idx, u_reads[rows], s[i], eps, W)
            out[rows, h] = infer.pooled(ll[rows, h], n_base[i], llm, n)
        return out

    def _fit(self, U, sc, idx, u_read, ref: dict | None = None, specs=None) -> float:
        """Goodness of fit of the leading hypotheses against `ref` (default the
        ensemble's reference, see faults.yaml `fit_blunders`): the best of their
        `fit_p` values."""
        if len(idx) == 0:
            return 1.0 if int(self.inf["fit_test_top"]) > 0 else 0.0
        lead = np.argsort(-sc.posterior)[:int(self.inf["fit_test_top"])]
        return max((self.fit_p(U, int(h), idx, u_read, ref, specs) for h in lead),
                   default=0.0)

    def fit_p(self, U, h: int, idx, u_read, ref: dict | None = None, specs=None) -> float:
        """Predictive p-value (infer.fit_pvalue) of readings u_read at observables idx
        under hypothesis h of U's rows, against `fit_reference`."""
        from diag.core import infer

        if len(idx) == 0:
            return 1.0
        return infer.fit_pvalue_from(self.fit_reference(U, h, idx, ref, specs), u_read)

    def fit_reference(self, U, h: int, idx, ref: dict | None = None, specs=None):
        """infer.fit_reference of hypothesis h of U's rows for the readings taken at idx
        (not empty), against `ref` (default the ensemble's reference; or _slip_ref()).
        `specs` (the hypotheses of U's rows) lets it be kept per (hypothesis, readings
        taken, reference) in `_fit_refs`, for diagnose and triage alike. The statistic
        uses Scott's kernel width (infer.spread), smoother than the ranking's: it is
        calibrated by its own reference either way, and the smoother one tells a misfit
        more surely."""
        from diag.core import infer

        ens = self.ensemble
        ref = ens.ref if ref is None else ref
        lo, W = self._blunder
        sp = self._scott if U.shape[0] == self._scott.shape[0] else None
        taken = tuple(int(j) for j in idx)
        which = "main" if ref is ens.ref else "slip" if ref is self._ref_slip else None
        key = None if specs is None or which is None else (
            specs[h].id, taken, which, sp is None)
        fr = self._fit_refs.get(key, False) if key is not None else False
        if fr is False:
            Uh = U[h] if specs is None or int(self.inf["refine_top"]) <= 0 else \
                self._units(U, specs, h)
            fr = infer.fit_reference(Uh, np.asarray(idx, dtype=int),
                                     float(self.inf["blunder"]), lo, W, ref["ref_k"],
                                     ref["ref_z"], ref["ref_b"], ref["ref_w"],
                                     None if sp is None else sp[h])
            if key is not None:
                if len(self._fit_refs) >= FIT_REF_KEEP:
                    self._fit_refs.clear()
                self._fit_refs[key] = fr
        return fr

    def _slip_ref(self) -> dict:
        """The fit reference with blunders at the modelled rate: readings a single fault
        explains with one slip of the probe pass it."""
        from diag.core import ensemble

        if self._ref_slip is None:
            R = len(self.ensemble.ref["ref_k"])
            self._ref_slip = ensemble.reference_draws(R, len(self.observables), self.seed)
        return self._ref_slip

    def diagnose(self, readings: Sequence[Reading],
                 healthy_prior: float | None = None, advise: bool = True) -> Diagnosis:
        """Rank every hypothesis for these readings, test the fit, advise the next.
        With `advise` False the next readings are left out (empty `next`): the ranking
        alone, for an interface that shows it before the advice is worked out."""
        with self._foreground():
            return self._diagnose(readings, healthy_prior, advise)

    def _diagnose(self, readings, healthy_prior, advise) -> Diagnosis:
        from diag.core import notes

        self.build()
        hp = float(self.inf["healthy_prior"]) if healthy_prior is None else float(healthy_prior)
        if not 0.0 <= hp < 1.0:
            raise DiagError(f"healthy prior {hp} must lie in [0, 1)",
                            hint="e.g. --healthy-prior 0.02")
        idx, vals, rejected = self._match(readings)
        noise = self._noise_obj
        u_read = noise.u(vals, idx) if len(idx) else np.empty(0)
        specs = list(self.specs)
        U = self._U
        sc, pri = self._score(U, specs, idx, u_read, hp)
        pval = self._fit(U, sc, idx, u_read, specs=specs)
        alpha = float(self.inf["fit_alpha"])
        pairs_tried = False
        # pairs only when no single fault explains the readings even with one slip: a
        # slip is likelier than a second fault that happens to match one odd reading
        if pval < alpha and len(idx) and (
                self.inf["fit_blunders"] or self._fit(U, sc, idx, u_read,
                                                      self._slip_ref(), specs) < alpha):
            pairs = self._pair_candidates(U, specs, sc.posterior, idx, u_read)
            if pairs:
                pairs_tried = True
                Up = noise.u(self._samples_of(pairs))
                U = np.concatenate([U, Up])
                specs = specs + pairs
                sc, pri = self._score(U, specs, idx, u_read, hp)
                pval = self._fit(U, sc, idx, u_read, specs=specs)
        fits = pval >= alpha
        post = sc.posterior
        order = np.argsort(-post, kind="stable")
        group = self.groups_for(order, U)
        renum: dict[int, int] = {}
        suspects = []
        for h in order:
            g = renum.setdefault(int(group[h]), len(renum))
            suspects.append(Suspect(specs[h].id, float(post[h]), g, specs[h].text))
        nxt = self._advise(U, specs, sc, idx, order, group, u_read) if advise else []
        acc = self._accuracy_fn()
        nts = tuple(notes.bench_notes(self.case, self.rules, [
            Reading(self.observables[j].point, self.observables[j].kind, v)
            for j, v in zip(idx, vals, strict=True)], acc))
        if any(self.observables[j].kind == "ac" for j in idx) and self.signal_warning():
            nts = (self.signal_warning(), *nts)
        if self.stability_warning():
            nts = (self.stability_warning(), *nts)
        odd = self._odd_readings(U, specs, order[0], idx, u_read)
        slips = [] if fits else self._unit_slips(U, specs, idx, vals, hp, alpha)
        if slips:  # one reading mis-taken explains it all: name it, not the others
            odd = []
        fit_text = self._verdict(fits, pval, len(idx), specs[order[0]], pairs_tried, odd,
                                 slips)
        confirm = {specs[h].id: specs[h].confirm for h in order[:5]}
        healthy_fits = bool(fits and len(idx) and healthy_leads(suspects)) and \
            self.fit_p(U, ids_index(specs, "healthy"), idx, u_read, specs=specs) >= alpha
        return Diagnosis(len(idx), bool(fits), tuple(suspects), tuple(nxt), nts, fit_text,
                         tuple(rejected), {"p_value": pval, "pairs_tried": pairs_tried,
                                           "confirm": confirm, "odd_readings": odd,
                                           "unit_slips": slips,
                                           "healthy_fits": healthy_fits})

    def groups_for(self, order: np.ndarray, U: np.ndarray | None = None) -> np.ndarray:
        """Group number per hypothesis (H,), formed around the leading suspects: greedy
        in `order` (hypothesis indices by falling posterior), numbered in that order.
        `U` is needed only for a hypothesis set beyond the built one (pairs; when its
        first rows are the built set's, only the added rows' separations are computed)."""
        from diag.core import infer

        ap = self._apart
        if U is not None and U.shape[0] != ap.shape[0]:
            q, sig = float(self.inf["group_quantile"]), float(self.inf["group_sigmas"])
            share = float(self.inf["group_share"])
            if self._extends_built(U):
                # the built hypotheses first, then pairs: only the pairs' rows are new
                if self._boxes is None:
                    self._boxes = infer.boxes(self._U, q, sig)
                ap = infer.apart_extend(U, ap, *self._boxes, q, sig, share)
            else:
                ap = infer.apart(U, q, sig, share)
        return infer.groups_from(ap, order)

    def _unit_slips(self, U, specs, idx, vals, hp: float, alpha: float) -> list[str]:
        """When no hypothesis fits: each taken reading that, with its sign turned (the
        probes the wrong way round), or a thousand times larger or smaller (a prefix
        slip, mV typed for V or back), would let the readings fit, with the sentence
        that says so. Only one reading is changed at a time."""
        from diag.core.values import format_value

        out = []
        noise = self._noise_obj
        for i, j in enumerate(idx):
            o = self.observables[j]
            for f in (-1.0, 1e3, 1e-3):
                if f < 0 and (o.kind != "dc" or vals[i] == 0):
                    continue
                v = np.array(vals, dtype=float)
                v[i] *= f
                u2 = noise.u(v, idx)
                sc, _ = self._score(U, specs, idx, u2, hp)
                p = self._fit(U, sc, idx, u2, specs=specs)
                if p >= alpha:
                    shown = (f"{o.point} {o.kind} reads {format_value(vals[i], o.unit)}, "
                             f"but {format_value(v[i], o.unit)} would fit the others "
                             f"(goodness of fit p = {p:.2f})")
                    out.append(shown + (f": {self._probes_reversed(o.point)}" if f < 0
                                        else ": a slip of the unit? Check the meter's "
                                        f"display and take {o.point} again."))
                    break
        return out

    def _probes_reversed(self, pid: str) -> str:
        """What to say of a reading at point `pid` whose sign looks turned."""
        pt = self.case.point(pid)
        if pt.supply:
            return (f"the meter's leads the wrong way round in the supply lead? Take {pid} "
                    "again with the current flowing into the red lead.")
        minus = pt.minus or self.case.ground
        return (f"the probes the wrong way round? Take {pid} again, red probe on {pt.node}, "
                f"black on {minus}.")

    def _odd_readings(self, U, specs, best: int, idx, u_read) -> list[str]:
        """Taken readings the leading hypothesis explains only as blunders ("TP5 dc")."""
        from diag.core import infer

        if len(idx) == 0:
            return []
        eps = float(self.inf["blunder"])
        lo, W = self._blunder
        sp = self._spread_for(U)[best:best + 1]
        per = infer.per_reading(U[best:best + 1], idx, u_read, eps, W, sp)[0]
        floor = np.log(eps / W[idx]) + 1.0
        return [f"{self.observables[j].point} {self.observables[j].kind}"
                for j, v, f in zip(idx, per, floor, strict=True) if v < f]

    def _pair_candidates(self, U, specs, post, idx, u_read) -> list:
        """Unrelated pairs worth solving when no single fault fits (hypotheses `specs`,
        posterior `post` (H,)): pairs among the `pair_top` leading single faults, and
        each of the three leading ones paired with the single faults that best explain
        the readings it misses."""
        from diag.core import faults, infer

        top = int(self.inf["pair_top"])
        order = [h for h in np.argsort(-post) if specs[h].origin == "single"]
        cands = faults.pair_specs(self.rules, [specs[h] for h in order[:top]],
                                  self._pair_scale)
        eps = float(self.inf["blunder"])
        lo, W = self._blunder
        per = infer.per_reading(U, idx, u_read, eps, W, self._spread_for(U))  # (H, d)
        floor = np.log(eps / W[idx]) + 1.0  # within e of the blunder floor: missed
        singles = np.array([s.origin == "single" for s in specs])
        for a in order[:3]:
            missed = per[a] < floor
            if not missed.any():
                continue
            fit_missed = np.where(singles, per[:, missed].sum(axis=1), -np.inf)
            fit_missed[a] = -np.inf
            best = [h for h in np.argsort(-fit_missed)[:top] if np.isfinite(fit_missed[h])]
            for h in best:
                cands += faults.pair_specs(self.rules, [specs[a], specs[h]], self._pair_scale)
        have = {s.id for s in specs}
        out, seen = [], set()
        for p in cands:
            if p.id not in have and p.id not in seen:
                seen.add(p.id)
                out.append(p)
        return out

    def _shown(self, v: float, o: Observable) -> str:
        """A predicted reading as the meter would round it (no error drawn)."""
        from diag.core import meter
        from diag.core.values import format_value

        q = float(meter.resolution(np.array([v]), self.case.meter, o.unit)[0])
        return format_value(round(v / q) * q + 0.0, o.unit)

    def _accuracy_fn(self):
        from diag.core import meter

        return lambda v: float(meter.accuracy(v, "dc", self.case.meter, "V"))

    def _parts_near(self, odd: Sequence[str]) -> list[str]:
        """Parts at the nodes of the readings named in `odd` ("TP7 dc"), in case order:
        where to look when those readings fit nothing."""
        nodes = set()
        for text in odd:
            pt = self.case.point(text.split(" ")[0])
            nodes |= {n for n in (pt.node, pt.minus) if n and n != self.case.ground}
            if pt.supply:
                nodes.add(self.case.part(pt.supply).nodes[0])
        return [p.ref for p in self.case.parts if nodes & set(p.nodes)]

    def _verdict(self, fits, pval, n, best, pairs_tried, odd, slips=()) -> str:
        """The fit text of a diagnosis (`Diagnosis.fit_text`): `_fit_text`, the readings
        that fit the leader only as slips (`odd`, "TP5 dc") named after it, or, where
        one reading mis-taken explains it all (`slips`, `_unit_slips`' sentences), those
        before the verdict as typed."""
        if slips:
            return " ".join(slips) + (
                " As typed, no modelled fault explains these readings (goodness of fit p = "
                f"{pval:.3f}); retake {'that reading' if len(slips) == 1 else 'those'} "
                "before looking further.")
        text = self._fit_text(fits, pval, n, best, pairs_tried, self._parts_near(odd))
        if odd:
            text += (f" {', '.join(odd)} {'does' if len(odd) == 1 else 'do'} not fit the "
                     f"leading suspect: a slip of the probe or range, or a fault outside "
                     f"the model; take {'it' if len(odd) == 1 else 'them'} again.")
        return text

    def _fit_text(self, fits, pval, n, best, pairs_tried, near=()) -> str:
        if n == 0:
            return "No readings yet: the ranking is the prior (how often each part fails)."
        if fits and pairs_tried:
            return ("No single fault explains the readings; with pairs of faults among the "
                    f"leading suspects tried too, the leading ones do (goodness of fit p = "
                    f"{pval:.2f}). Check both parts of a paired suspect.")
        if fits:
            return (f"The leading suspects explain the readings (goodness of fit p = "
                    f"{pval:.2f}).")
        tried = " Pairs of faults among the leading suspects were tried too." if pairs_tried \
            else ""
        where = (f"the parts at the readings that fit least ({', '.join(near)})" if near
                 else f"the parts the closest suspect names ({', '.join(best.parts) or 'none'})")
        return ("No modelled fault explains these readings (goodness of fit p = "
                f"{pval:.3f}).{tried} The fault is likely outside the model: check for a "
                "wrong part fitted, a solder bridge between neighbouring pads, a transistor "
                "fitted the wrong way round, or a second fault; re-take any reading that "
                f"looks odd, and inspect the board around {where}.")

    def _advise(self, U, specs, sc, idx, order, group, u_read) -> list[NextReading]:
        """Next readings by expected gain per cost (advise.gains) over every drawn unit
        of the hypotheses, weighted by the posterior and the readings u_read (at idx)."""
        from diag.core import advise, infer

        untaken = np.array([j for j in range(len(self.observables)) if j not in set(idx)],
                           dtype=int)
        if len(untaken) == 0:
            return []
        sp = self._spread_for(U)
        width = np.sqrt(1.0 + infer.bandwidth(U, len(idx) + 1, sp) ** 2)  # once taken
        Ua, llk = self._with_further(U, specs, sc.loglik_k, idx, u_read, order)
        bits = advise.gains(Ua, advise.unit_weights(llk, sc.posterior), untaken,
                            labels=group, width=width, eps=float(self.inf["blunder"]),
                            W=self._blunder[1])
        out = []
        samples = [self.ensemble.samples]
        if U.shape[0] > self.ensemble.samples.shape[0]:
            samples.append(self._noise_obj.y(U[self.ensemble.samples.shape[0]:]))
        X = np.concatenate(samples) if len(samples) > 1 else samples[0]
        lead, seen = [], set()  # leading suspects of distinct groups
        for h in order:
            if int(group[h]) not in seen:
                seen.add(int(group[h]))
                lead.append(h)
            if len(lead) == 3:
                break
        for j, b in zip(untaken, bits, strict=True):
            if b < 1e-3:
                continue
            o = self.observables[j]
            parts = []
            for h in lead:
                key = (specs[h].id, int(j))  # the median of a hypothesis's units is fixed
                text = self._lead_text.get(key)
                if text is None:
                    xs = X[h, :, j]
                    xs = xs[np.isfinite(xs)]
                    text = f"{specs[h].id}: {self._shown(float(np.median(xs)), o)}" \
                        if len(xs) else ""
                    self._lead_text[key] = text
                if text:
                    parts.append(text)
            out.append((b / o.cost, NextReading(o.point, o.kind, float(b), "; ".join(parts))))
        out.sort(key=lambda t: -t[0])
        return [n for _, n in out]

    def _with_further(self, U, specs, llk, idx, u_read, order):
        """U (H, K, M) and its per-unit log-likelihoods llk (H, K) with the further units
        of the `refine_top` leading hypotheses in `order` joined on (H, K + Kx, M) and
        (H, K + Kx); NaN and -inf in the other rows. Their kernel is the K units' (as
        in `_refine`), so the advice weighs each leading suspect's units as its
        likelihood does."""
        from diag.core import infer

        top = int(self.inf["refine_top"])
        if top <= 0 or len(idx) == 0:
            return U, llk
        rows = np.asarray(order[:top], dtype=int)
        more = self._further_u([specs[h] for h in rows])                 # (r, Kx, M)
        H, K, M = U.shape
        s = self._widths(U, rows, idx)
        L = infer.unit_logliks(more, idx, u_read[None], s, float(self.inf["blunder"]),
                               self._blunder[1])[0]                       # (r, Kx)
        X = np.full((H, more.shape[1], M), np.nan)
        Lx = np.full((H, more.shape[1]), -np.inf)
        X[rows], Lx[rows] = more, L
        return np.concatenate([U, X], axis=1), np.concatenate([llk, Lx], axis=1)

    # -- groups ----------------------------------------------------------------------------

    def splitters(self) -> dict[int, str]:
        """For each group of several hypotheses: the kind of reading that would split it
        (a DC or AC reading at a node no point offers, a supply current, or a
        powered-off check), in words."""
        from diag.core import infer

        ens = self.ensemble
        out = {}
        names = ens.hidden_names
        band = ens.hidden_band
        offered = set()
        for pt in self.case.points:
            if pt.supply:
                offered.add(f"current {pt.supply}")
            elif pt.minus in (None, self.case.ground):
                offered.update(f"{k} {pt.node}" for k in pt.reads)
        sig = float(self.inf["group_sigmas"])
        me = self.inf["model_error"]
        for g in sorted(set(int(x) for x in ens.group)):
            mem = [h for h in range(len(ens.hypotheses)) if ens.group[h] == g]
            if len(mem) < 2:
                continue
            found = []
            for x, name in enumerate(names):
                if name in offered:
                    continue
                lo, hi = band[mem, 0, x], band[mem, 1, x]
                kind = name.split()[0]
                a, b = {"dc": (me["dc_rel"], me["dc_v"]), "ac": (me["ac_rel"], me["ac_v"]),
                        "current": (me["a_rel"], me["a_abs"])}[kind]
                nz = infer.Noise(np.array([a]), np.array([b]))
                ul, uh = nz.u(lo), nz.u(hi)
                if not (np.all(np.isfinite(ul)) and np.all(np.isfinite(uh))):
                    continue
                if (ul[:, None] - uh[None, :] > 2 * sig).any():
                    found.append(name)
            if any(n.startswith("ac") for n in found):
                out[g] = f"an AC reading (signal applied) at node {_first(found, 'ac')}"
            elif any(n.startswith("current") for n in found):
                out[g] = (f"the current drawn from {_first(found, 'current')} (an ammeter "
                          f"in series with its lead)")
            elif found:
                out[g] = f"a DC reading at node {_first(found, 'dc')} (no test point there yet)"
            else:
                out[g] = "a powered-off check: " + " / ".join(
                    f"{ens.hypotheses[h].id}: {ens.hypotheses[h].confirm}" for h in mem[:3]
                    if ens.hypotheses[h].confirm)
        return out


def _first(names, kind):
    return next(n.split(" ", 1)[1] for n in names if n.startswith(kind))
