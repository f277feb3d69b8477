"""Batched modified nodal analysis: DC operating point (Newton-Raphson), AC small-signal
and Thevenin impedances, for B variants of one compiled Circuit at once.

Array contract: results have a leading batch axis B, then nodes (case order, ground
excluded); float64 for DC (volts, amperes, ohms), complex128 for AC (volts rms).
Internally the batch is the LAST (fast) axis: values (entries, B).

Only this module assembles and factors matrices. The part kinds stamp (parts/). Supplies
are Norton sources, so the unknowns are node voltages only (internal nodes behind series
resistances included). Linear solves use a straight-line LU generated for the circuit's
fixed sparsity pattern (minimum-degree order, no pivoting, each entry a (B,) vector
operation; the Newton work arrays are reused between solves, one set per thread, since
first-touching fresh memory cost a quarter of the time). Newton-Raphson starts every
variant from the nominal solution, with its junctions first evaluated where they carry
the nominal currents (parts' `start`), SPICE pnjlim limiting after that, and iterates
only the variants not yet accepted. A step is
accepted when it is small, no junction was limited, and the KCL residual at every node
is what such a Newton step answers; so a garbled no-pivot solve cannot pass. Variants
that fail are retried with gmin stepping and then source stepping on a pivoting dense
solve; any still failing come back `ok = False`, NaN, with a reason in words. A node left
without a DC path to ground (an open part) is named in `why` (the variant stays ok).
"""

from __future__ import annotations

import threading
from collections.abc import Mapping, Sequence
from dataclasses import dataclass

import numpy as np

from diag.core.errors import DiagError
from diag.core.netlist import Circuit

GSHUNT = 1e-15            # siemens from every unknown node to ground (keeps every node defined;
                          # far below the 1e-12 S SPICE gmin across junctions)
VNTOL = 1e-6              # volts, absolute Newton step tolerance (SPICE vntol)
RELTOL = 3e-5             # relative Newton step tolerance (SPICE uses 1e-3); the accepted
                          # point is one Newton step on, so its error is far smaller
LOOSE_AFTER = 8           # iterations after which a variant whose residual passes is accepted
LOOSE_REL, LOOSE_ABS = 1e-4, 1e-4   # with steps this small (volts): a floating node's voltage
                          # jitters at this level from rounding (1e-12 S beside 50 S)
MAXIT = 60                # Newton iterations per attempt
RES_REL = 1e-5            # accepted KCL residual at the last iterate: below VNTOL times the
                          # node's conductance plus this fraction of its source and device
                          # currents
RES_ABS = 1e-14           # amperes, accepted KCL residual floor
SADDLE_S = 1e6            # past every growth rate: this many times the largest
                          # conductance in the Jacobian, per farad (saddle)
SETTLE_PUSH = 1e-3        # volts at the largest node: the first push off a saddle (_settle)
SETTLE_STEPS = 200        # most backward-Euler steps at twice the growth rate
ALT_JUNCTION = 0.7        # volts: every junction forward at the first iteration of the
                          # search for a second stable state (_alternate_x)
ALT_VOLTS = 0.01          # volts: two solutions further apart at some node are distinct
                          # (Newton's tolerance is under a millivolt at these levels)
FLOAT_OHMS = 3e8          # a node whose resistance to ground exceeds this floats (opens: >=1e9)
GMIN_STEPS = (1e-2, 1e-3, 1e-4, 1e-5, 1e-6, 1e-7, 1e-8, 1e-9, 1e-10)   # siemens, then 0
SOURCE_STEPS = tuple(np.linspace(0.0, 1.0, 21)[1:-1])              # then the full sources
KEEP_BUFFER = 1 << 22     # elements (32 MiB of float64) up to which a work buffer is kept
                          # between solves (first touch of fresh memory costs page faults)
_WORK = threading.local()  # the kept work buffers, one set per thread (_Plan.buffer)


@dataclass(frozen=True)
class DCResult:
    """DC operating points of B variants.

    v          (B, n_nodes) volts at the case nodes (NaN where not ok)
    i_supply   (B, S) amperes delivered by each supply (circuit.supplies order)
    ok         (B,) bool, converged and checked
    why        per variant: None, or a reason for people (a failure when not ok; a warning
               such as a floating node when ok)
    iterations (B,) Newton iterations used
    x          (B, n_unknowns) volts at every unknown (internal nodes included)
    settled    (B,) bool, diag put the variant in a switched state of its choosing: its
               first solution was a balance point a real unit leaves (a saddle), or the
               circuit has two stable states and this is the other one (solve_dc)
    """

    v: np.ndarray
    i_supply: np.ndarray
    ok: np.ndarray
    why: list
    iterations: np.ndarray
    x: np.ndarray
    settled: np.ndarray | None = None


@dataclass(frozen=True)
class ACResult:
    """Small-signal phasors at circuit.hz: v (B, n_nodes) complex128 volts rms (NaN where
    the DC operating point is not ok); x (B, n_unknowns)."""

    v: np.ndarray
    x: np.ndarray
    hz: float


# ----------------------------------------------------------------------------- plan

class _Plan:
    """Everything fixed by the topology: sparsity pattern, elimination steps, devices."""

    def __init__(self, circuit: Circuit, extra: frozenset = frozenset()):
        self.n = n = len(circuit.unknowns)
        pairs: set[tuple[int, int]] = {(i, i) for i in range(n)}
        for i, j in extra:                     # branches of `load` between two unknowns
            pairs |= {(i, j), (j, i)}
        self.devices = []   # (part index, device, node index array (ground -> n))
        parts = zip(circuit.parts, circuit.kinds, circuit.terms, strict=True)
        for pi, (part, kind, t) in enumerate(parts):
            nom = _nominal_p(circuit, pi)
            for st in (kind.dc_stamps(part, nom, t)[0],
                       kind.ac_stamps(part, nom, t, 1.0)[0]):
                for i, j, _ in st:
                    if i >= 0 and j >= 0:
                        pairs |= {(i, j), (j, i)}
            devs = kind.device(part, t)
            for dev in devs if isinstance(devs, tuple) else (devs,):
                if dev is None:
                    continue
                idx = [i for i in dev.nodes if i >= 0]
                pairs |= {(i, j) for i in idx for j in idx}
                self.devices.append((pi, dev, np.array([i if i >= 0 else n for i in dev.nodes])))
        self._symbolic(pairs)

    def _symbolic(self, pairs):
        n = self.n
        adj = [set() for _ in range(n)]
        for i, j in pairs:
            if i != j:
                adj[i].add(j)
                adj[j].add(i)
        # minimum-degree order with fill
        left = set(range(n))
        order = []
        work = [set(a) for a in adj]
        while left:
            k = min(left, key=lambda q: (len(work[q]), q))
            order.append(k)
            nb = work[k]
            for i in nb:
                work[i] |= nb - {i}
                work[i].discard(k)
            left.discard(k)
        # slots for every (i, j) in the filled pattern
        slot: dict[tuple[int, int], int] = {}

        def s(i, j):
            if (i, j) not in slot:
                slot[(i, j)] = len(slot)
            return slot[(i, j)]

        for i, j in sorted(pairs):
            s(i, j)
        done = set()
        steps = []
        for k in order:
            rows = sorted(work[k] - done)
            kk = s(k, k)
            ik = np.array([s(i, k) for i in rows], dtype=np.intp)
            kj = np.array([s(k, j) for j in rows], dtype=np.intp)
            ij = np.array([s(i, j) for i in rows for j in rows], dtype=np.intp)
            ik_rep = np.repeat(ik, len(rows))
            kj_rep = np.tile(kj, len(rows))
            steps.append((k, kk, np.array(rows, dtype=np.intp), ik, kj, ij, ik_rep, kj_rep))
            done.add(k)
        self.slot = slot
        self.nz = len(slot)
        self.steps = steps
        self.diag = np.array([slot[(i, i)] for i in range(n)], dtype=np.intp)
        keys = sorted(pairs)
        self.rows = np.array([slot[p] for p in keys], dtype=np.intp)  # original entries
        self.r_i = np.array([p[0] for p in keys], dtype=np.intp)
        self.r_j = np.array([p[1] for p in keys], dtype=np.intp)
        self.dev_slots = []
        for _, _dev, idx in self.devices:
            ent = []
            for a, i in enumerate(idx):
                for b, j in enumerate(idx):
                    if i < n and j < n:
                        ent.append((a, b, slot[(int(i), int(j))]))
            self.dev_slots.append(ent)
        self._compile()

    # -- numeric LU on the pattern (values: (nz, B), float or complex) --
    def _compile(self):
        """Straight-line code of the factorisation and the two substitutions: every
        entry is a row of the (nz, B) value array, every operation a (B,) vector op."""
        f = ["def factor(M):", "    R = list(M)", "    t = np.empty_like(R[0])"]
        fw = ["def forward(R, Y):", "    t = np.empty_like(Y[0])"]
        bw = ["def backward(R, Y):", "    t = np.empty_like(Y[0])"]
        for k, kk, rows, ik, _kj, ij, ik_rep, kj_rep in self.steps:
            for a in ik:
                f.append(f"    dv(R[{a}], R[{kk}], out=R[{a}])")
            for a, b2, c in zip(ij, ik_rep, kj_rep, strict=True):
                f.append(f"    mul(R[{b2}], R[{c}], out=t); sub(R[{a}], t, out=R[{a}])")
            for i, a in zip(rows, ik, strict=True):
                fw.append(f"    mul(R[{a}], Y[{k}], out=t); sub(Y[{i}], t, out=Y[{i}])")
        for k, kk, rows, _ik, kj, *_ in reversed(self.steps):
            for j, a in zip(rows, kj, strict=True):
                bw.append(f"    mul(R[{a}], Y[{j}], out=t); sub(Y[{k}], t, out=Y[{k}])")
            bw.append(f"    dv(Y[{k}], R[{kk}], out=Y[{k}])")
        f.append("    return M")
        fw.append("    return Y")
        bw.append("    return Y")
        mv = ["def matvec(R, X, Y):", "    t = np.empty_like(Y[0])"]
        first = set()
        for slot_, i, j in zip(self.rows, self.r_i, self.r_j, strict=True):
            if i not in first:
                first.add(i)
                mv.append(f"    mul(R[{slot_}], X[{j}], out=Y[{i}])")
            else:
                mv.append(f"    mul(R[{slot_}], X[{j}], out=t); add(Y[{i}], t, out=Y[{i}])")
        mv.append("    return Y")
        ns = {"np": np, "dv": np.divide, "mul": np.multiply, "sub": np.subtract,
              "add": np.add}
        exec("\n".join(f + fw + bw + mv), ns)     # generated from the fixed pattern only
        self._factor, self._forward, self._backward = ns["factor"], ns["forward"], ns["backward"]
        self._matvec = ns["matvec"]

    @staticmethod
    def buffer(name: str, shape: tuple, dtype=float) -> np.ndarray:
        """An uninitialised work array of `shape`, reused between calls in this thread
        by every plan (kept up to KEEP_BUFFER elements, so the memory held is that of the
        largest solve). Callers must not hold it past their return nor use one name twice
        at once."""
        size = int(np.prod(shape))
        store = _WORK.__dict__
        key = (name, np.dtype(dtype).str)
        a = store.get(key)
        if a is None or a.size < size:
            a = np.empty(size, dtype=dtype)
            if size <= KEEP_BUFFER:
                store[key] = a
        return a[:size].reshape(shape)

    def matvec(self, M, x, out=None):
        """A x for unfactored pattern values M (nz, B) and x (n(+1), B): (n, B), written
        into `out` when given."""
        y = np.empty((self.n, M.shape[1]), dtype=np.result_type(M, x)) if out is None else out
        self._matvec(list(M), list(x), list(y))
        return y

    def factor(self, M):
        """In-place LU of M (nz, B); returns M."""
        return self._factor(M)

    def solve_lu(self, M, y):
        """Solve with a factored M; y (n, ..., B) right-hand sides, overwritten."""
        if y.ndim == 2:
            R = list(M)
        else:
            R = [r.reshape((1,) * (y.ndim - 2) + r.shape) for r in M]
        Y = list(y)
        self._forward(R, Y)
        self._backward(R, Y)
        return y

    def dense(self, M):
        """(B, n, n) dense matrices of pattern values M (nz, B) (unfactored)."""
        B = M.shape[1]
        D = np.zeros((B, self.n, self.n), dtype=M.dtype)
        D[:, self.r_i, self.r_j] = M[self.rows].T
        return D

    def solve(self, M, b, dense=False):
        """x with A x = b for pattern values M (nz, B) and b (n, ..., B); M is kept."""
        if not dense:
            with np.errstate(all="ignore"):
                return self.solve_lu(self.factor(M.copy()), b.copy())
        D = self.dense(M)
        rhs = np.moveaxis(b, -1, 0).reshape(D.shape[0], self.n, -1)
        out = np.full(rhs.shape, np.nan, dtype=np.result_type(D, rhs))
        try:
            out = np.linalg.solve(D, rhs)
        except np.linalg.LinAlgError:
            for q in range(D.shape[0]):
                try:
                    out[q] = np.linalg.solve(D[q], rhs[q])
                except np.linalg.LinAlgError:
                    pass
        return np.moveaxis(out.reshape((D.shape[0],) + b.shape[:-1]), 0, -1)


def _plan(circuit: Circuit, load_idx: Sequence[tuple[int, int, object]] = ()) -> _Plan:
    """The circuit's plan; with `load` branches between two non-ground unknowns that the
    parts do not already join, a plan whose pattern holds them too (cached per pair set)."""
    p = circuit.cache.get("plan")
    if p is None:
        p = circuit.cache["plan"] = _Plan(circuit)
    extra = frozenset((min(i, j), max(i, j)) for i, j, _ in load_idx
                      if i >= 0 and j >= 0 and (i, j) not in p.slot)
    if extra:
        key = ("plan", extra)
        q = circuit.cache.get(key)
        if q is None:
            q = circuit.cache[key] = _Plan(circuit, extra)
        p = q
    return p


def _load_index(circuit: Circuit, load) -> list[tuple[int, int, object]]:
    """`load` [(node_a, node_b, y)] as [(unknown a, unknown b, y)]; ground = -1."""
    return [(circuit.index(a), circuit.index(b), y) for a, b, y in (load or ())]


def _stamp_branches(plan: _Plan, A: np.ndarray, branches) -> None:
    """Add each branch y (siemens, scalar or (B,)) between unknowns i and j to A
    (ground = -1): the two-terminal admittance stamp of modified nodal analysis."""
    slot = plan.slot
    for i, j, y in branches:
        if i >= 0:
            A[slot[(i, i)]] += y
        if j >= 0:
            A[slot[(j, j)]] += y
        if i >= 0 and j >= 0:
            A[slot[(i, j)]] -= y
            A[slot[(j, i)]] -= y


def _stamp_load(plan: _Plan, A: np.ndarray, load_idx) -> None:
    """Add each extra branch y (siemens, scalar or (B,)) between unknowns i and j to A."""
    _stamp_branches(plan, A, ((i, j, np.asarray(y)) for i, j, y in load_idx))


# ----------------------------------------------------------------------------- params

def _nominal_p(circuit: Circuit, pi: int) -> dict:
    return circuit.part_nominal(circuit.parts[pi].ref)


def _batch(circuit: Circuit, params: Mapping[str, object] | None) -> tuple[int, list[dict]]:
    """(B, per-part parameter dicts) with arrays (B,) or scalars."""
    params = params or {}
    keys = circuit.cache.get("keys")
    if keys is None:
        keys = circuit.cache["keys"] = [
            [(k[len(part.ref) + 1:], k) for k in circuit.nominal
             if k.startswith(part.ref + ".")] for part in circuit.parts]
    unknown = [k for k in params if k not in circuit.nominal]
    if unknown:
        raise DiagError(f"unknown parameter {unknown[0]!r}", file=circuit.case.path,
                        hint="keys are '<ref>.<name>' with names per DEVELOPERS.md, e.g. "
                             + ", ".join(list(circuit.nominal)[:3]))
    B = 1
    arrs = {}
    fixed = circuit.cache.get("fixed")
    if fixed is None:   # series resistances that are 0 in the model: no internal node exists
                        # (a transistor's collector and emitter always have one)
        fixed = circuit.cache["fixed"] = {
            k for k, v in circuit.nominal.items()
            if v == 0.0 and k.rsplit(".", 1)[1] in ("rs", "rb")}
    for k, v in params.items():
        a = np.asarray(v, dtype=float)
        if k in fixed and np.any(a != 0.0):
            raise DiagError(f"{k} cannot change: the model has {k.rsplit('.', 1)[1].upper()} "
                            "= 0, so the circuit has no node behind it",
                            where=k.split(".")[0], hint="give the series resistance in the "
                            "part's model to vary it")
        if a.ndim > 1:
            raise DiagError(f"parameter {k!r} must be a scalar or a (B,) array")
        if a.ndim == 1 and a.shape[0] != 1:
            if B not in (1, a.shape[0]):
                raise DiagError(f"parameter {k!r} has {a.shape[0]} variants, others {B}")
            B = a.shape[0]
        arrs[k] = a
    out = []
    nominal = circuit.nominal
    for plist in keys:
        d = {}
        for short, k in plist:
            a = arrs.get(k)
            if a is None:
                d[short] = nominal[k]
            elif a.ndim == 0 or a.shape[0] == 1:
                d[short] = float(a.reshape(-1)[0])
            else:
                d[short] = a
        out.append(d)
    return B, out


def _nominal_dp(circuit: Circuit, plan) -> list[dict]:
    dp = circuit.cache.get("dp_nominal")
    if dp is None:
        dp = circuit.cache["dp_nominal"] = _prepared(plan, _batch(circuit, None)[1])
    return dp


def _sub(d: dict, act) -> dict:
    return {k: (v[act] if isinstance(v, np.ndarray) and v.ndim else v) for k, v in d.items()}


def _prepared(plan: _Plan, P: list[dict]) -> list[dict]:
    """Per-device parameter dicts with the device's per-solve constants."""
    out = []
    for pi, dev, _ in plan.devices:
        keys = getattr(dev, "keys", None)   # the part's parameters the device reads
        d = dict(P[pi]) if keys is None else {k: P[pi][k] for k in keys}
        d.update(dev.prepare(d))
        out.append(d)
    return out


# ----------------------------------------------------------------------------- assembly

def _linear(circuit: Circuit, plan: _Plan, P: list[dict], B: int, omega: float | None,
            reuse: bool = False):
    """Pattern values (nz, B) and injections (n, B) of the linear parts (DC or AC). With
    `reuse` they are the plan's work buffers (valid until the next such call)."""
    dtype = float if omega is None else complex
    if reuse:
        A = plan.buffer("A_lin", (plan.nz, B), dtype)
        b = plan.buffer("b_lin", (plan.n, B), dtype)
        A.fill(0.0)
        b.fill(0.0)
    else:
        A = np.zeros((plan.nz, B), dtype=dtype)
        b = np.zeros((plan.n, B), dtype=dtype)
    for pi, (part, kind) in enumerate(zip(circuit.parts, circuit.kinds, strict=True)):
        t = circuit.terms[pi]
        if omega is None:
            g_list, inj = kind.dc_stamps(part, P[pi], t)
        else:
            g_list, inj = kind.ac_stamps(part, P[pi], t, omega)
        _stamp_branches(plan, A, g_list)
        for i, c in inj:
            if i >= 0:
                b[i] += c
    A[plan.diag] += GSHUNT
    return A, b


def _stamp_devices(plan, DP, x, state, A, b, act, limit=True, currents=None, init=False):
    """Add every device's companion model at x (n+1, Ba) to A, b; update state in place.
    With `currents` (n, Ba) given, add the device currents at x (leaving each node) to it.
    A device whose eval gives J None has nothing to stamp this time (its state is still
    kept). Returns limited (Ba,) bool."""
    limited = np.zeros(x.shape[1], dtype=bool)
    for q, ((_, dev, idx), ent) in enumerate(zip(plan.devices, plan.dev_slots, strict=True)):
        v = x[idx]
        if not init and hasattr(dev, "quiet") and dev.quiet(DP[q], v):
            J, new, lim = None, dev.junctions(v), False   # skipped before any slicing
        else:
            p = DP[q] if act is None else _sub(DP[q], act)
            st = None
            if state is not None:
                st = state[q] if act is None else tuple(s[act] for s in state[q])
            J, ieq, new, lim = dev.eval(p, v, st, limit=limit, init=init)
        if J is not None:   # None: nothing to stamp (a quiet breakdown junction)
            for a, bb, s in ent:
                A[s] += J[a][bb]
            for a, i in enumerate(idx):
                if i < plan.n:
                    b[i] -= ieq[a]
            if currents is not None:
                for a, i in enumerate(idx):
                    if i < plan.n:
                        jv = J[a][0] * v[0]
                        for u in range(1, len(idx)):
                            jv += J[a][u] * v[u]
                        currents[i] += ieq[a] + jv
        if state is not None:
            for s_full, s_new in zip(state[q], new, strict=True):
                if act is None:
                    s_full[:] = s_new
                else:
                    s_full[act] = s_new
        limited |= lim
    return limited


def _junction_state(plan, x):
    return [[np.array(np.broadcast_to(j, x.shape[1:]), dtype=float)
             for j in dev.junctions(x[idx])] for _, dev, idx in plan.devices]


def _newton(plan, DP, A_lin, b_lin, x, act, probe, gextra=0.0, scale=1.0, dense=False,
            maxit=MAXIT, start=None, dsign=None):
    """Newton-Raphson on variants `act` from x (n+1, B), in place. A variant is accepted
    when its step is below tolerance, no junction was limited, and its KCL residual at
    every unknown is within tolerance. The work runs on a working set of variants that is
    compacted only when fewer than half of it are still iterating (gathers cost more than
    the arithmetic). For accepted variants (LU path) probe[:, q] gets J^-1 · 1 (A/V), the
    floating-node probe. `start` (per device, junction voltages (B,)) is where the devices
    are evaluated in the first iteration (which accepts nothing); else at x. `gextra`
    (siemens from every unknown to ground) is a number, or one per variant of act.
    `dsign` (B,) int, when given, gets for each variant accepted on the LU path without
    gextra the sign of the determinant of the DC Jacobian it was accepted with (the
    product of its LU pivots' signs, 0 where one is 0 or not finite; the Jacobian of the
    iterate one step short of the solution, which differs from it by the step's
    tolerance); `_settle` screens for saddles with it.
    Returns the accepted subset of act and iterations per variant."""
    B = x.shape[1]
    gw = np.asarray(gextra, dtype=float)       # per working column when not a number
    has_g = bool(np.any(gw))
    its = np.zeros(B, dtype=int)
    conv = []
    W = act                                    # working set (indices into B)
    live = np.ones(W.size, dtype=bool)         # still iterating, per working column
    full = W.size == B
    Aw, bw = (A_lin, b_lin) if full else (A_lin[:, W], b_lin[:, W])
    if full:
        xw = plan.buffer("xw", x.shape)
        np.copyto(xw, x)
    else:
        xw = x[:, W]
    DPw = DP if full else [_sub(d, W) for d in DP]
    if start is None:
        state = _junction_state(plan, xw)
    else:
        state = [[np.array(np.broadcast_to(j, (B,)))[W] for j in st] for st in start]
    bufA = plan.buffer("A", (plan.nz, W.size))    # reused buffers (no page faults per step)
    bufC = plan.buffer("C", (plan.n, W.size))
    bufR = plan.buffer("R", (plan.n, 2, W.size))
    bufD = plan.buffer("D", (plan.n, W.size))     # |step|
    bufT = plan.buffer("T", (plan.n, W.size))     # step tolerance
    bufF = plan.buffer("F", (plan.n, W.size))     # A x of the candidates
    bufK = plan.buffer("K", (plan.n, W.size), bool)
    bufG = plan.buffer("G", (plan.n, W.size))
    bufS = plan.buffer("S", (plan.n, W.size))     # source and device currents
    for it_no in range(maxit):
        if not live.any():
            break
        if live.sum() < 0.5 * W.size:          # compact the working set
            keep = np.flatnonzero(live)
            W, Aw, bw, xw = W[keep], Aw[:, keep], bw[:, keep], xw[:, keep]
            if gw.ndim:
                gw = gw[keep]
            DPw = [_sub(d, keep) for d in DPw]
            state = [[s[keep] for s in st] for st in state]
            live = np.ones(W.size, dtype=bool)
        nw = W.size
        A = bufA[:, :nw]
        np.copyto(A, Aw)
        if has_g:
            A[plan.diag] += gw
        first = start is not None and it_no == 0    # devices evaluated at `start`
        if dense:
            b = bw * scale
        else:                                   # right-hand sides: b and the 1 A probe
            rhs = bufR[:, :1, :nw] if first else bufR[:, :, :nw]
            b = rhs[:, 0]
            np.multiply(bw, scale, out=b)
            if not first:
                rhs[:, 1] = 1.0
        dev_cur = None if first else bufC[:, :nw]
        if dev_cur is not None:
            dev_cur.fill(0.0)
        lim = _stamp_devices(plan, DPw, xw, state, A, b, None, currents=dev_cur, init=first)
        gdiag = None                            # node conductances, siemens
        if not first:
            gdiag = np.take(A, plan.diag, axis=0, out=bufG[:, :nw])
            np.abs(gdiag, out=gdiag)
        if dense:
            xn = plan.solve(A, b, dense=True)
            yp = None
        else:
            with np.errstate(all="ignore"):
                y = plan.solve_lu(plan.factor(A), rhs)
            xn, yp = y[:, 0], (y[:, 1] if y.shape[1] > 1 else None)
        its[W[live]] += 1
        if first:                              # devices were not evaluated at xw
            fin = np.isfinite(xn).all(axis=0)
            live &= fin
            np.copyto(xw[:-1], xn)
            continue
        with np.errstate(invalid="ignore"):
            fin = np.isfinite(xn).all(axis=0)
            dx, tol, cmp = bufD[:, :nw], bufT[:, :nw], bufK[:, :nw]
            np.subtract(xn, xw[:-1], out=dx)
            np.abs(dx, out=dx)
            np.abs(xn, out=tol)
            if it_no >= LOOSE_AFTER:
                ax = tol.copy()
            tol *= RELTOL
            tol += VNTOL
            step_ok = np.less_equal(dx, tol, out=cmp).all(axis=0)
            if it_no >= LOOSE_AFTER:
                step_ok |= (dx <= LOOSE_REL * ax + LOOSE_ABS).all(axis=0)
            cand = live & fin & step_ok & ~lim
        if cand.any():
            ci = np.flatnonzero(cand)
            # a Newton step dx answers a residual of about J dx: allow that (the step is
            # accepted only when small), so a garbled linear solve still shows up here
            if ci.size > 0.3 * W.size:      # cheaper than gathering the columns: in place
                good = _residual_ok(plan, Aw, bw, xw, dev_cur, dx, gdiag, scale, gw,
                                    bufF[:, :nw], bufS[:, :nw], tol, cmp)[ci]
            else:
                F = plan.matvec(Aw[:, ci], xw[:, ci])
                src = np.abs(bw[:, ci]) * scale + np.abs(dev_cur[:, ci])
                F += dev_cur[:, ci] - bw[:, ci] * scale
                if has_g:
                    F += (gw[ci] if gw.ndim else gw) * xw[:-1, ci]
                newton = 2.0 * dx[:, ci].max(axis=0) + VNTOL
                with np.errstate(invalid="ignore"):
                    good = (np.abs(F) <= newton * gdiag[:, ci] + RES_REL * src
                            + RES_ABS).all(axis=0)
            cand[ci[~good]] = False
            acc = ci[good]
            x[:-1, W[acc]] = xn[:, acc]
            if yp is not None:
                probe[:, W[acc]] = yp[:, acc]
                if dsign is not None and not has_g:
                    dsign[W[acc]] = _pivot_sign(A[plan.diag][:, acc])
            conv.append(W[acc])
        live = live & fin & ~cand
        np.copyto(xw[:-1], xn)         # the accepted and the dropped are not read again
    return (np.concatenate(conv) if conv else np.zeros(0, dtype=int)), its


def _residual_ok(plan, A, b, x, dev_cur, dx, gdiag, scale, gextra, F, S, T, cmp):
    """(Bw,) bool: the KCL residual test of _newton on every working column, the same
    arithmetic as its gathered form, in the given (n, Bw) work arrays F, S, T, cmp."""
    with np.errstate(all="ignore"):
        plan.matvec(A, x, out=F)
        np.abs(b, out=S)                   # src = |b| scale + |device currents|
        S *= scale
        np.abs(dev_cur, out=T)
        S += T
        np.multiply(b, scale, out=T)       # F += device currents - b scale
        np.subtract(dev_cur, T, out=T)
        F += T
        if np.any(gextra):
            F += gextra * x[:-1]
        newton = 2.0 * dx.max(axis=0) + VNTOL
        np.multiply(newton, gdiag, out=T)  # newton gdiag + RES_REL src + RES_ABS
        S *= RES_REL
        T += S
        T += RES_ABS
        np.abs(F, out=F)
        return np.less_equal(F, T, out=cmp).all(axis=0)


def _nominal_x(circuit: Circuit, plan: _Plan) -> np.ndarray:
    """Nominal operating point (n+1,), cached on the circuit; zeros if it fails."""
    x0 = circuit.cache.get("x_nominal")
    if x0 is None:
        B, P = _batch(circuit, None)
        DP = _prepared(plan, P)
        A_lin, b_lin = _linear(circuit, plan, P, 1, None)
        x = np.zeros((plan.n + 1, 1))
        probe = np.full((plan.n, 1), np.nan)
        ok, _ = _robust(plan, DP, A_lin, b_lin, x, np.arange(1), np.zeros((plan.n + 1, 1)),
                        probe)
        x0 = x[:, 0].copy() if ok[0] else np.zeros(plan.n + 1)
        circuit.cache["x_nominal"] = x0
    return x0


def _alternate_x(circuit: Circuit, plan: _Plan) -> np.ndarray | None:
    """A second stable operating point of the nominal circuit (n+1,), or None; cached on
    the circuit. Newton from every junction forward-biased (ALT_JUNCTION volts at the
    first iteration) ends, for a circuit with one operating point, where the nominal
    start does; a latch with a stable off state (a thyristor pair) is found on. Kept
    when it is more than ALT_VOLTS from the nominal point at some node and neither is a
    saddle (a balance point is `_settle`'s)."""
    if "x_alternate" in circuit.cache:
        return circuit.cache["x_alternate"]
    x0 = _nominal_x(circuit, plan)
    B, P = _batch(circuit, None)
    DP = _prepared(plan, P)
    A_lin, b_lin = _linear(circuit, plan, P, 1, None)
    DPn = _nominal_dp(circuit, plan)
    start = [tuple(np.full(np.shape(j), ALT_JUNCTION) for j in
                   dev.start(DP[q], DPn[q], x0[idx][:, None]))
             for q, (_, dev, idx) in enumerate(plan.devices)]
    x = np.zeros((plan.n + 1, 1))
    probe = np.full((plan.n, 1), np.nan)
    with np.errstate(all="ignore"):
        ok, _ = _robust(plan, DP, A_lin, b_lin, x, np.arange(1),
                        np.zeros((plan.n + 1, 1)), probe, start)
        out = None
        if ok[0] and np.max(np.abs(x[:circuit.n_nodes, 0] - x0[:circuit.n_nodes])) > ALT_VOLTS:
            both = np.column_stack([x0, x[:, 0]])
            J = _jacobian(circuit, plan, DP, np.repeat(A_lin, 2, axis=1), both, np.arange(2))
            if not _saddle(plan, J, circuit.n_nodes).any():
                out = x[:, 0].copy()
    circuit.cache["x_alternate"] = out
    return out


def two_states(circuit: Circuit) -> bool:
    """Whether the nominal circuit has a second stable operating point besides the one
    the nominal start finds (`_alternate_x`: a latch with a stable off state)."""
    return _alternate_x(circuit, _plan(circuit)) is not None


def _other_state(circuit, plan, DP, A_lin, b_lin, x, ok, probe, its) -> np.ndarray:
    """Put the odd-numbered variants of x (n+1, B) in the circuit's other stable state
    (`_alternate_x`), in place, where Newton from it converges to a point that is not a
    saddle; returns (B,) bool, the variants moved."""
    B = x.shape[1]
    moved = np.zeros(B, dtype=bool)
    xa = _alternate_x(circuit, plan)
    if xa is None:
        return moved
    rows = np.flatnonzero(ok)
    rows = rows[rows % 2 == 1]
    if rows.size == 0:
        return moved
    x0 = x[:, rows].copy()
    x[:, rows] = xa[:, None]
    good, it = _newton(plan, DP, A_lin, b_lin, x, rows, probe)
    its[rows] += it[rows]
    if good.size:
        still = _saddle(plan, _jacobian(circuit, plan, DP, A_lin, x, good), circuit.n_nodes)
        good = good[~still]
        moved[good] = np.max(np.abs(x[:circuit.n_nodes, good] - x0[:circuit.n_nodes,
                             np.searchsorted(rows, good)]), axis=0) > ALT_VOLTS
    back = ~moved[rows]
    x[:, rows[back]] = x0[:, back]
    probe[:, rows] = np.nan
    return moved


def _robust(plan, DP, A_lin, b_lin, x, act, x_start, probe, start=None, dsign=None):
    """Newton from x on `act`, then gmin stepping, then source stepping for the rest.
    Returns (ok (B,), iterations (B,)); x holds the accepted solutions. `dsign`: see
    _newton (set by the first Newton only; the stepped variants keep 0, unknown)."""
    B = x.shape[1]
    ok = np.zeros(B, dtype=bool)
    its = np.zeros(B, dtype=int)
    good, it = _newton(plan, DP, A_lin, b_lin, x, act, probe, start=start, dsign=dsign)
    its += it
    ok[good] = True
    rest = act[~ok[act]]
    if rest.size:   # gmin stepping, pivoting dense solves, ending without extra gmin
        x[:, rest] = x_start[:, rest] if x_start.shape[1] == B else x_start[:, :1]
        live, it = _stepped(plan, DP, A_lin, b_lin, x, rest, probe, "gextra", GMIN_STEPS)
        its += it
        ok[live] = True
        rest = rest[~ok[rest]]
    if rest.size:   # source stepping from zero, ending at the full sources
        x[:, rest] = 0.0
        live, it = _stepped(plan, DP, A_lin, b_lin, x, rest, probe, "scale", SOURCE_STEPS)
        its += it
        ok[live] = True
    return ok, its


def _stepped(plan, DP, A_lin, b_lin, x, live, probe, knob: str, steps):
    """One continuation: Newton (dense, pivoting solves) on variants `live` at each
    value of `knob` (_newton's `gextra` or `scale`) in `steps`, then once without it.
    Returns the variants that converged at the end and the iterations taken."""
    its = 0
    for v in steps:
        live, it = _newton(plan, DP, A_lin, b_lin, x, live, probe, dense=True, **{knob: v})
        its += it
    live, it = _newton(plan, DP, A_lin, b_lin, x, live, probe, dense=True)
    return live, its + it


# ----------------------------------------------------------------------------- DC

def solve_dc(circuit: Circuit, params: Mapping[str, object] | None = None, *,
             load: Sequence[tuple[str, str, object]] | None = None,
             x_start: np.ndarray | None = None, settle: bool = True) -> DCResult:
    """DC operating point of every variant (see DCResult). Starts from the nominal
    solution; never raises for a variant that fails (ok False, why says so).

    `load` adds branches that are not parts: [(node_a, node_b, g)] with g siemens, a
    scalar or (B,) per variant, between two case nodes (either may be the ground), e.g. a
    meter's input. i_supply does not count the current of such a branch. `x_start`
    (B, n_unknowns) volts, e.g. the unloaded solution (DCResult.x), is where Newton
    starts instead of the nominal point (non-finite columns start from the nominal).

    A solution from the nominal start that is a balance point a real unit leaves (a
    latch between its states: `saddle`) is moved to a stable point beside it, half the
    variants each way (`_settle`); in a circuit with two stable states (`two_states`)
    the odd-numbered variants are put in the other one (`_other_state`); both show in
    DCResult.settled. `settle` False leaves every solution where it lands; a solve
    from `x_start` is left where it lands (its caller chose the start: the same state
    under a meter's load or through a tone)."""
    load_idx = _load_index(circuit, load)
    plan = _plan(circuit, load_idx)
    x0 = _nominal_x(circuit, plan)
    B, P = _batch(circuit, params)
    if x_start is not None:
        B = max(B, np.shape(x_start)[0])
    for _, _, g in load_idx:
        if np.ndim(g):
            B = max(B, np.shape(g)[0])
    DP = _prepared(plan, P)
    A_lin, b_lin = _linear(circuit, plan, P, B, None, reuse=True)   # used only in here
    _stamp_load(plan, A_lin, load_idx)
    x = np.repeat(x0[:, None], B, axis=1)
    probe = np.full((plan.n, B), np.nan)
    if x_start is None:
        DPn = _nominal_dp(circuit, plan)
        start = [dev.start(DP[q], DPn[q], x[idx])
                 for q, (_, dev, idx) in enumerate(plan.devices)]
    else:
        xs0 = np.asarray(x_start, dtype=float).T
        if xs0.shape != (plan.n, B):
            raise DiagError(f"solve_dc: x_start must be (B, {plan.n}) volts")
        fin = np.isfinite(xs0).all(axis=0)
        x[:-1, fin] = xs0[:, fin]
        start = None
    dsign = np.zeros(B, dtype=int) if x_start is None and settle else None
    ok, its = _robust(plan, DP, A_lin, b_lin, x, np.arange(B), x0[:, None], probe, start,
                      dsign)
    settled = np.zeros(B, dtype=bool)
    if x_start is None and settle:
        settled = _settle(circuit, plan, DP, A_lin, b_lin, x, ok, probe, its, dsign)
        settled |= _other_state(circuit, plan, DP, A_lin, b_lin, x, ok & ~settled, probe,
                                its)
    why: list = [None] * B
    for q in np.flatnonzero(~ok):
        why[q] = ("did not converge: no consistent DC operating point found "
                  "(Newton, gmin stepping and source stepping tried)")
    x[:, ~ok] = np.nan
    floating = _floating(circuit, plan, DP, A_lin, x, np.flatnonzero(ok), probe)
    for q, names in floating.items():
        nodes = ", ".join(names)
        one = len(names) == 1
        why[q] = (f"node{'' if one else 's'} {nodes} ha{'s' if one else 've'} no DC path to "
                  f"ground (an open part isolates {'it' if one else 'them'}); "
                  "the voltage there is set only by leakage")
    xs = x[:-1].T.copy()
    v = xs[:, :circuit.n_nodes]
    return DCResult(v=v, i_supply=_supply_currents(circuit, plan, P, DP, x, B), ok=ok,
                    why=why, iterations=its, x=xs, settled=settled)


def _supply_currents(circuit, plan, P, DP, x, B):
    """(B, S) amperes delivered by each supply: the current the rest of the network draws
    at its plus node (at its minus node when plus is the ground), summed part by part so
    a near-zero source resistance loses no precision."""
    out = np.zeros((B, len(circuit.supplies)))
    col = 0
    for pi, part in enumerate(circuit.parts):
        if part.kind != "supply":
            continue
        t = circuit.terms[pi]
        node, sign = (t["plus"], 1.0) if t["plus"] >= 0 else (t["minus"], -1.0)
        if node < 0:
            p = P[pi]
            out[:, col] = p["v"] / np.maximum(p["r"], 1e-6)
        else:
            out[:, col] = sign * _outflow(circuit, plan, P, DP, x, node, pi)
        col += 1
    return out


def _outflow(circuit, plan, P, DP, x, node, skip):
    """(B,) amperes leaving unknown `node` into every part but part index `skip`."""
    tot = GSHUNT * x[node]
    for pi, (part, kind) in enumerate(zip(circuit.parts, circuit.kinds, strict=True)):
        if pi == skip:
            continue
        t = circuit.terms[pi]
        if node not in t.values():
            continue
        g_list, inj = kind.dc_stamps(part, P[pi], t)
        for i, j, g in g_list:
            if i == node:
                tot = tot + g * (x[i] - x[j])
            if j == node:
                tot = tot + g * (x[j] - x[i])
        for i, c in inj:
            if i == node:
                tot = tot - c
    for q, (pi, dev, idx) in enumerate(plan.devices):
        if pi == skip or node not in idx:
            continue
        v = x[idx]
        J, ieq, _, _ = dev.eval(DP[q], v, None, limit=False)
        if J is None:
            continue
        for a, i in enumerate(idx):
            if i == node:
                tot = tot + ieq[a] + sum(J[a][u] * v[u] for u in range(len(idx)))
    return tot


def _jacobian(circuit, plan, DP, A_lin, x, act):
    """Pattern values (nz, Ba) of the DC Jacobian at x for variants act."""
    A = A_lin[:, act].copy()
    b = np.zeros((plan.n, act.size))
    _stamp_devices(plan, DP, x[:, act], None, A, b, act, limit=False)
    return A


def _floating(circuit, plan, DP, A_lin, x, act, probe) -> dict[int, list[str]]:
    """Variants (index -> node names) where case nodes have no DC path to ground: a 1 A
    probe into every node shows them (the sum of transfer resistances is huge there);
    suspects are confirmed by the diagonal of the inverse Jacobian (> FLOAT_OHMS)."""
    if act.size == 0:
        return {}
    y = probe[:, act]
    have = np.isfinite(y).all(axis=0)
    with np.errstate(all="ignore"):
        if (~have).any():
            A = _jacobian(circuit, plan, DP, A_lin, x, act[~have])
            y[:, ~have] = plan.solve(A, np.ones((plan.n, int((~have).sum()))), dense=True)
        sus = ~(np.abs(y[:circuit.n_nodes]) <= FLOAT_OHMS).all(axis=0)
    out = {}
    if sus.any():
        D = plan.dense(_jacobian(circuit, plan, DP, A_lin, x, act[sus]))
        try:
            inv = np.linalg.inv(D)
        except np.linalg.LinAlgError:
            inv = np.full(D.shape, np.inf)
        rth = np.abs(np.diagonal(inv, axis1=1, axis2=2))[:, :circuit.n_nodes]
        for q, r in zip(act[sus], rth, strict=True):
            names = [circuit.nodes[i] for i in np.flatnonzero(~(r <= FLOAT_OHMS))]
            if names:
                out[int(q)] = names
    return out


def saddle(circuit: Circuit, params: Mapping[str, object] | None, dc: DCResult
           ) -> np.ndarray:
    """(B,) bool: each variant's operating point is one a real unit leaves (False where
    the point is not ok). Small departures x from it obey C dx/dt = -J x, J the DC
    Jacobian (the discrete capacitors open, as in J) and C an equal capacitance from
    every node to ground standing for the parts' own (none on the branch currents).
    P(s) = det(J + sC) is real, so its complex roots come in pairs, and it has an odd
    number of real positive roots (growth rates) exactly when its sign at s = 0 differs
    from its sign past its largest root: then the point is a saddle, whatever those
    capacitances are (a loop with a gain above one at DC, a latch at its balance
    point). The sign past the largest root is that at SADDLE_S times the largest
    conductance the matrix holds; both signs come from the solver's own LU pivots."""
    plan = _plan(circuit)
    B, P = _batch(circuit, params)
    B = max(B, dc.v.shape[0])
    DP = _prepared(plan, P)
    act = np.flatnonzero(dc.ok)
    out = np.zeros(B, dtype=bool)
    if act.size:
        A_lin, _ = _linear(circuit, plan, P, B, None)
        xp = np.vstack([dc.x.T, np.zeros((1, B))])
        out[act] = _saddle(plan, _jacobian(circuit, plan, DP, A_lin, xp, act),
                           circuit.n_nodes)
    return out


def _det_sign(plan, M: np.ndarray) -> np.ndarray:
    """(B,) sign of det of each matrix of pattern values M (nz, B): the product of the
    signs of its LU pivots (the elimination order permutes rows and columns alike, so
    the determinant is the pivots' product); 0 where a pivot is 0 or not finite."""
    with np.errstate(all="ignore"):
        piv = plan.factor(M.copy())[plan.diag]
    return _pivot_sign(piv)


def _pivot_sign(piv: np.ndarray) -> np.ndarray:
    """(B,) the product of the signs of LU pivots piv (n, B); 0 where one is 0 or not
    finite."""
    bad = ~np.isfinite(piv).all(axis=0) | (piv == 0).any(axis=0)
    return np.where(bad, 0, np.prod(np.sign(piv), axis=0)).astype(int)


def _saddle(plan, M: np.ndarray, n_nodes: int) -> np.ndarray:
    """(Ba,) bool from DC Jacobians as pattern values M (nz, Ba): see `saddle`."""
    s0, s_far = _saddle_signs(plan, M, n_nodes)
    return (s0 != 0) & (s_far != 0) & (s0 != s_far)


def _saddle_signs(plan, M: np.ndarray, n_nodes: int) -> tuple[np.ndarray, np.ndarray]:
    """(Ba,) determinant signs of the DC Jacobians M (nz, Ba) and of M with SADDLE_S
    farads on every node (`saddle`)."""
    node = plan.diag[:n_nodes]
    branch = np.abs(M[plan.diag[n_nodes:]])
    with np.errstate(divide="ignore"):
        inv = np.where(branch > 1e-9, 1.0 / branch, 0.0)              # 1 / series ohms
    scale = np.maximum(np.abs(M).max(axis=0), 1.0)
    if inv.size:
        scale = np.maximum(scale, inv.max(axis=0))
    far = M.copy()
    far[node] += SADDLE_S * scale                                     # 1 F on every node
    return _det_sign(plan, M), _det_sign(plan, far)


def _growing(J: np.ndarray, n_nodes: int) -> tuple[np.ndarray, float] | None:
    """(direction (n,), scaled to 1 V at its largest node; growth rate, per second with
    1 F on every node) of the growing mode of a saddle with Jacobian J (n, n), or None:
    the eigenvector of J^-1 C whose eigenvalue mu = -1 / rate is the most negative real
    one, signed so that the first node (case order) that swings at least half as much as
    the largest rises."""
    C = np.zeros(J.shape[0])
    C[:n_nodes] = 1.0
    try:
        mu, vec = np.linalg.eig(np.linalg.solve(J, np.diag(C)))
    except np.linalg.LinAlgError:
        return None
    real = np.abs(mu.imag) <= 1e-9 * np.maximum(np.abs(mu), 1e-300)
    neg = np.flatnonzero(real & (mu.real < 0))
    if neg.size == 0:
        return None
    k = neg[np.argmin(mu.real[neg])]
    d = vec[:, k].real
    big = np.max(np.abs(d[:n_nodes]))
    if not big > 0:
        return None
    # the sign: the first node (case order) at half the largest swing or more rises, so
    # that every unit of a case is pushed the same way (an eigenvector's sign is free)
    first = d[np.flatnonzero(np.abs(d[:n_nodes]) >= 0.5 * big)[0]]
    return d / big * np.sign(first), -1.0 / float(mu.real[k])


def _pulled(plan, DP, A_lin, b_lin, x, live, probe, g, its) -> np.ndarray:
    """One backward-Euler step of the variants `live` of x (n+1, B), in place: Newton on
    f(x) + g (x - x_prev) = 0, g (siemens, one per variant of live) from every unknown
    to its value now. Returns the variants that converged; adds to `its`."""
    b = b_lin.copy()
    b[:, live] += g * x[:-1, live]
    good, it = _newton(plan, DP, A_lin, b, x, live, probe, gextra=g)
    its[live] += it[live]
    return good


def _settle(circuit, plan, DP, A_lin, b_lin, x, ok, probe, its, dsign=None) -> np.ndarray:
    """Move the variants of x (n+1, B) whose solution is a saddle (`saddle`) to the
    stable point it leads to, in place, and return (B,) bool, the variants moved.

    From the saddle pushed SETTLE_PUSH volts along its growing mode (even-numbered
    variants one way, odd ones the other: which switched state a unit is in is part of
    the unit), backward-Euler steps with 1 F on every node follow the circuit as it
    leaves: each step solves f(x) + g (x - x_prev) = 0 (Newton with the conductance g
    from every unknown to its last value) at g twice its own growth rate (steps
    much longer than 1 / rate would hold the saddle) while its steps grow (leaving the
    saddle speeds up; nearing a stable point slows down; at most SETTLE_STEPS), then
    with g falling tenfold a step to nothing, and once at g = 0. A variant whose end
    point is again a saddle, or fails, or never slowed, is put back where it was.

    Screening (`dsign`, the determinant signs Newton accepted each variant with): the
    sign past every growth rate comes from the network's linear part alone (the
    capacitance there outweighs every device's conductance), so it is taken from the
    first variant's exact check, and only the variants whose determinant sign differs
    from it, or is unknown, get the exact check of `saddle` (the Jacobian at the
    solution and both signs). Every variant of the 41 circuits tried (the bundled cases,
    the test circuits, and those of our own outside the repository, latches included)
    had that same sign; tests/test_solver.py checks that the screen finds what the full
    check finds."""
    B = x.shape[1]
    moved = np.zeros(B, dtype=bool)
    act = np.flatnonzero(ok)
    if act.size == 0:
        return moved
    if dsign is not None:
        ref = act[:1]
        far = _saddle_signs(plan, _jacobian(circuit, plan, DP, A_lin, x, ref),
                            circuit.n_nodes)[1][0]
        act = act[(dsign[act] != far) | (dsign[act] == 0) | (far == 0)]
        if act.size == 0:
            return moved
    sad = _saddle(plan, _jacobian(circuit, plan, DP, A_lin, x, act), circuit.n_nodes)
    if not sad.any():
        return moved
    rows, dirs, rates = [], [], []
    J = plan.dense(_jacobian(circuit, plan, DP, A_lin, x, act[sad]))
    for q, Jq in zip(act[sad], J, strict=True):
        got = _growing(Jq, circuit.n_nodes)
        if got is not None:
            rows.append(q)
            dirs.append(got[0] * (1.0 if q % 2 == 0 else -1.0))
            rates.append(got[1])
    if not rows:
        return moved
    rows = np.array(rows)
    x0 = x[:, rows].copy()
    x[:-1, rows] += SETTLE_PUSH * np.array(dirs).T
    g0 = 2.0 * np.array(rates)             # each variant's step conductance, siemens
    live = rows
    last = np.zeros(rows.size)             # each variant's last step, volts
    for _ in range(SETTLE_STEPS):          # at g0 until each has passed its fastest step
        k = np.searchsorted(rows, live)
        before = x[:-1, live].copy()
        good = _pulled(plan, DP, A_lin, b_lin, x, live, probe, g0[k], its)
        step = np.max(np.abs(x[:-1, live] - before), axis=0)
        passed = step < last[k]            # slowing down: on its way to a stable point
        last[k] = step
        live = np.intersect1d(live[~passed], good)
        if live.size == 0:
            break
    live = np.setdiff1d(rows, live)        # those past their fastest step
    for f in 10.0 ** -np.arange(1, 13):   # then g falling to nothing
        if live.size == 0:
            break
        good = _pulled(plan, DP, A_lin, b_lin, x, live, probe,
                       g0[np.searchsorted(rows, live)] * f, its)
        live = np.intersect1d(live, good)
    if live.size:
        good, it = _newton(plan, DP, A_lin, b_lin, x, live, probe, dense=True)
        its[live] += it[live]
        live = np.intersect1d(live, good)
    if live.size:
        still = _saddle(plan, _jacobian(circuit, plan, DP, A_lin, x, live), circuit.n_nodes)
        live = live[~still]
    moved[live] = True
    back = ~np.isin(rows, live)
    x[:, rows[back]] = x0[:, back]
    probe[:, rows] = np.nan        # the steps' probes held g: _floating works them out anew
    return moved


# ----------------------------------------------------------------------------- AC

def _ac_matrix(circuit, plan, P, DP, dc, B, act, load_idx=()):
    omega = 2.0 * np.pi * circuit.hz
    A, b = _linear(circuit, plan, P, B, omega)
    _stamp_load(plan, A, load_idx)
    xp = np.vstack([dc.x.T, np.zeros((1, B))])
    Ad = A[:, act]
    bz = np.zeros((plan.n, act.size), dtype=complex)
    _stamp_devices(plan, DP, xp[:, act], None, Ad, bz, act, limit=False)
    return Ad, b[:, act]


def solve_ac(circuit: Circuit, params: Mapping[str, object] | None, dc: DCResult, *,
             load: Sequence[tuple[str, str, object]] | None = None) -> ACResult:
    """Small-signal node phasors (volts rms) at circuit.hz about each variant's DC
    operating point, the signal source driving with its vac behind r. `load` adds
    branches [(node_a, node_b, y)] of y complex siemens at circuit.hz (scalar or (B,)),
    e.g. a meter's r_in ∥ c_in; `dc` should then be solved with the same branch's DC
    conductance (solve_dc's `load`)."""
    load_idx = _load_index(circuit, load)
    plan = _plan(circuit, load_idx)
    B, P = _batch(circuit, params)
    B = max(B, dc.v.shape[0])
    if dc.v.shape[0] != B:
        raise DiagError("solve_ac: params and the DC result have different batch sizes")
    DP = _prepared(plan, P)
    act = np.flatnonzero(dc.ok)
    x = np.full((B, plan.n), np.nan + 0j)
    if act.size:
        A, b = _ac_matrix(circuit, plan, P, DP, dc, B, act, load_idx)
        x[act] = plan.solve(A, b).T
    return ACResult(v=x[:, :circuit.n_nodes], x=x, hz=circuit.hz)


# ----------------------------------------------------------------------------- Thevenin

def thevenin(circuit: Circuit, params: Mapping[str, object] | None, dc: DCResult,
             pairs: Sequence[tuple[str, str]], ac: ACResult | None = None, *,
             columns: bool = False, load: Sequence[tuple[str, str, object]] | None = None):
    """Impedance seen between each (node_plus, node_minus) pair at each variant's
    operating point: (B, P) ohms from the DC Jacobian, or complex ohms at circuit.hz when
    `ac` is given. Either node may be the ground. NaN where the DC point is not ok.
    With `columns`, returns (impedances, transfer) where transfer (B, P, n_unknowns) is
    the change of every unknown per ampere driven into node_plus and out of node_minus
    (volts per ampere, the linearised response). `load` as in solve_dc (admittances at
    circuit.hz with `ac`): branches that are not parts, such as a meter's input."""
    load_idx = _load_index(circuit, load)
    plan = _plan(circuit, load_idx)
    B, P = _batch(circuit, params)
    B = max(B, dc.v.shape[0])
    DP = _prepared(plan, P)
    act = np.flatnonzero(dc.ok)
    idx = [(circuit.index(a), circuit.index(b)) for a, b in pairs]
    dtype = complex if ac is not None else float
    out = np.full((B, len(idx)), np.nan, dtype=dtype)
    cols = np.full((B, len(idx), plan.n), np.nan, dtype=dtype) if columns else None
    if act.size == 0 or not idx:
        return (out, cols) if columns else out
    if ac is None:
        A_lin, _ = _linear(circuit, plan, P, B, None)
        _stamp_load(plan, A_lin, load_idx)
        xp = np.vstack([dc.x.T, np.zeros((1, B))])
        A = _jacobian(circuit, plan, DP, A_lin, xp, act)
    else:
        A, _ = _ac_matrix(circuit, plan, P, DP, dc, B, act, load_idx)
    rhs = np.zeros((plan.n, len(idx), act.size), dtype=dtype)
    for k, (i, j) in enumerate(idx):
        if i >= 0:
            rhs[i, k] += 1.0
        if j >= 0:
            rhs[j, k] -= 1.0
    y = plan.solve(A, rhs)
    for k, (i, j) in enumerate(idx):
        zi = y[i, k] if i >= 0 else 0.0
        zj = y[j, k] if j >= 0 else 0.0
        out[act, k] = zi - zj
    if columns:
        cols[act] = y.transpose(2, 1, 0)
        return out, cols
    return out


# ----------------------------------------------------------------------------- batches

def take(params: Mapping[str, object], idx: np.ndarray, B: int) -> dict[str, object]:
    """params restricted to variants idx of a batch of B (scalars and 1-element arrays,
    shared by every variant, stay as they are)."""
    out = {}
    for k, v in params.items():
        a = np.asarray(v)
        out[k] = a[idx] if a.ndim == 1 and a.shape[0] == B and B > 1 else v
    return out


def take_dc(dc: DCResult, idx: np.ndarray) -> DCResult:
    """The DCResult of variants idx alone."""
    return DCResult(v=dc.v[idx], i_supply=dc.i_supply[idx], ok=np.asarray(dc.ok)[idx],
                    why=[dc.why[i] for i in idx], iterations=np.asarray(dc.iterations)[idx],
                    x=dc.x[idx],
                    settled=None if dc.settled is None else np.asarray(dc.settled)[idx])


# ----------------------------------------------------------------------------- regions

def node_v(circuit: Circuit, v: np.ndarray, node: str) -> np.ndarray:
    """Column (B,) of node voltages `v` (B, n_nodes), DCResult.v or ACResult.v, for a
    case node; zeros (of v's dtype) for the ground."""
    if node == circuit.ground:
        return np.zeros(v.shape[0], dtype=v.dtype)
    return v[:, circuit.node_index[node]]


def regions(circuit: Circuit, params: Mapping[str, object] | None,
            dc: DCResult) -> dict[str, np.ndarray]:
    """Operating region of each transistor per variant: ref -> (B,) array of 'off',
    'active', 'saturated', 'reverse' ('' where the DC point is not ok)."""
    plan = _plan(circuit)
    B, P = _batch(circuit, params)
    B = max(B, dc.v.shape[0])
    DP = _prepared(plan, P)
    xp = np.vstack([np.nan_to_num(dc.x.T), np.zeros((1, B))])
    out = {}
    for q, (pi, dev, idx) in enumerate(plan.devices):
        if hasattr(dev, "region"):
            p = {k: (np.broadcast_to(v, (B,)) if np.ndim(v) else v) for k, v in DP[q].items()}
            r = np.asarray(dev.region(p, xp[idx]), dtype="<U9")
            r = np.broadcast_to(r, (B,)).copy()
            r[~dc.ok] = ""
            out[circuit.parts[pi].ref] = r
    return out
