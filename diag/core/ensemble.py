"""The only place random values are drawn, always from a numpy Generator it is given.

`draw_healthy(circuit, K, rng)` draws K healthy units within the part tolerances of a
compiled Circuit (its `spreads`). Fault draws are added below by the faults engineer.
"""

from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np

if TYPE_CHECKING:  # annotation only: a cached ensemble loads without the solver stack
    from diag.core.netlist import Circuit


def draw_healthy(circuit: Circuit, K: int, rng: np.random.Generator) -> dict[str, np.ndarray]:
    """Parameters of K healthy units: dict "<ref>.<name>" -> (K,) float64 array.

    Per spread (see parts.base.Spread): "uniform" multiplies the nominal by 1 + U(a, b)
    (resistors uniform inside tol, default 5 %; capacitors per tol, electrolytics -20/+20 %
    by default; supplies within tol); "loguniform" draws the first key's value
    log-uniformly in [a, b] (hFE in the part's hfe range; electrolytic leakage resistance
    between the leakage-limit value and 100 times it) and scales the other keys with it;
    "lognormal" multiplies by exp(N(0, a)) (saturation currents). Keys without a spread
    are left out (nominal). Draws follow circuit.spreads order, so a seed gives the same
    units for the same circuit. A spread with a `stream` number (a supply's current limit
    `.ilim`, 1; a transistor's breakdown series resistance `.rbv`, 2) draws from a side
    stream of that number, seeded from `rng` without advancing it, so that such a spread
    leaves every other draw, here and after (the faults' values), as it was: a limit no
    unit reaches changes nothing, nor does a breakdown no unit meets.
    """
    out: dict[str, np.ndarray] = {}
    state = int(rng.bit_generator.state["state"]["state"])
    sides: dict[int, np.random.Generator] = {}
    for s in circuit.spreads:
        nom0 = circuit.nominal[s.keys[0]]
        g = rng if s.stream == 0 else sides.setdefault(
            s.stream, np.random.default_rng([state, s.stream]))
        if s.dist == "uniform":
            f = 1.0 + g.uniform(s.a, s.b, K)
        elif s.dist == "loguniform":
            f = np.exp(g.uniform(np.log(s.a), np.log(s.b), K)) / nom0
        elif s.dist == "lognormal":
            f = np.exp(g.normal(0.0, s.a, K))
        else:
            raise ValueError(f"unknown spread {s.dist!r} for {s.keys}")
        for k in s.keys:
            out[k] = circuit.nominal[k] * f
    return out


# ---------------------------------------------------------------------------------------
# Fault hypotheses and the ensemble cache (used by diag/core/engine.py; written by the
# faults engineer). faults.py describes each hypothesis's parameter changes as data; the
# values are drawn here, from a Generator seeded per hypothesis.

import os  # noqa: E402
import zlib  # noqa: E402
from pathlib import Path  # noqa: E402

from diag.core.errors import DiagError  # noqa: E402


def hypothesis_rng(seed: int, fault_id: str, stream: int = 0) -> np.random.Generator:
    """The Generator for one hypothesis's draws: seeded by (seed, crc32 of its id), so a
    hypothesis draws the same units whatever else is built with it; `stream` > 0 gives
    further units of the same hypothesis, independent of stream 0's."""
    key = [int(seed), zlib.crc32(fault_id.encode("utf-8"))]
    return np.random.default_rng(key + [int(stream)] if stream else key)


def _draw_range(lo: float, hi: float, log: bool, n: int, rng: np.random.Generator):
    if lo == hi:
        return np.full(n, float(lo))
    if log:
        return np.exp(rng.uniform(np.log(lo), np.log(hi), size=n))
    return rng.uniform(lo, hi, size=n)


def apply_changes(circuit, params: dict, changes, n: int, rng: np.random.Generator) -> dict:
    """A copy of `params` (B = n) with a fault's changes applied: "set" gives the value,
    "abs" draws it in [lo, hi], "times" multiplies the drawn healthy value by a factor
    drawn in [lo, hi] (log-uniformly when `log`), "like" takes the healthy drawn value of
    parameter `src` (from `params`, before any change) times such a factor."""
    out = dict(params)

    def drawn(src: dict, key: str) -> np.ndarray:
        v = src.get(key)
        return np.full(n, float(circuit.nominal[key])) if v is None else \
            np.asarray(v, dtype=float)

    for ch in changes:
        for key in (ch.key, ch.src):
            if key is not None and key not in circuit.nominal:
                raise DiagError(f"fault changes unknown parameter {key!r}",
                                where=key, hint="parameter names per DEVELOPERS.md; check "
                                "rules/faults.yaml")
        if ch.how == "set":
            val = np.full(n, ch.lo)
        else:
            x = _draw_range(ch.lo, ch.hi, ch.log, n, rng)
            if ch.how == "times":
                val = drawn(out, ch.key) * x
            elif ch.how == "like":
                val = drawn(params, ch.src) * x
            else:
                val = x
        out[ch.key] = val
    return out


_JUNCTION_N = {"diode": "n", "led": "n", "zener": "n", "npn": "nf", "pnp": "nf"}


def apply_ambient(circuit, params: dict, n: int, rng: np.random.Generator,
                  ambient: dict) -> dict:
    """A copy of `params` (B = n) with every unit at its own ambient temperature, drawn
    uniformly in ambient["celsius"] (°C) and shared by all the unit's junctions.

    The solver works at 27 °C (parts.base.T_KELVIN), so a warmer junction is stamped as
    the same junction with a larger saturation current: at a fixed current its forward
    voltage moves by ambient["vj_per_k"] (V/K, about -2 mV/K for silicon junctions, the
    handbook figure), i.e. IS x exp(-vj_per_k dT / (N VT)); the BJT's ISE likewise with
    NE, and ISC with NC. BF and BR follow SPICE's temperature law (T / T0)^XTB with XTB
    the part's card's when it gives one, else ambient["xtb"]."""
    from diag.core.parts.base import T_KELVIN, VT

    lo, hi = (float(x) for x in ambient["celsius"])
    dT = rng.uniform(lo, hi, n) + 273.15 - T_KELVIN
    tc = float(ambient["vj_per_k"])
    ratio = (T_KELVIN + dT) / T_KELVIN
    out = dict(params)
    nom = circuit.nominal

    def cur(key):
        v = out.get(key)
        return np.full(n, float(nom[key])) if v is None else np.asarray(v, dtype=float)

    for part in circuit.parts:
        nkey = _JUNCTION_N.get(part.kind)
        if nkey is None:
            continue
        ref = part.ref
        out[f"{ref}.is"] = cur(f"{ref}.is") * np.exp(-tc * dT / (cur(f"{ref}.{nkey}") * VT))
        if part.kind in ("npn", "pnp"):
            for isx, nx in (("ise", "ne"), ("isc", "nc")):
                out[f"{ref}.{isx}"] = cur(f"{ref}.{isx}") * np.exp(
                    -tc * dT / (cur(f"{ref}.{nx}") * VT))
            beta = ratio ** float((part.model or {}).get("XTB", ambient["xtb"]))
            out[f"{ref}.bf"] = cur(f"{ref}.bf") * beta
            out[f"{ref}.br"] = cur(f"{ref}.br") * beta
    return out


def draw_unit(circuit, spec, n: int, rng: np.random.Generator,
              ambient: dict | None = None) -> dict:
    """n units (B = n) with one hypothesis's fault: tolerance draws, the ambient
    temperature (when `ambient` is given, see `apply_ambient`; else 27 °C), the fault
    draws, then each AC point's overdrive draw (uniform 0..1, overdrive.py)."""
    params = draw_healthy(circuit, n, rng)
    if ambient:
        params = apply_ambient(circuit, params, n, rng, ambient)
    params = apply_changes(circuit, params, spec.changes, n, rng)
    from diag.core.overdrive import PREFIX

    for k in circuit.nominal:  # last, so that they leave every other draw as it was
        if k.startswith(PREFIX):
            params[k] = rng.uniform(0.0, 1.0, n)
    return params


def draw_hypotheses(circuit, specs, K: int, seed: int, ambient: dict | None = None,
                    stream: int = 0) -> dict:
    """K units of every hypothesis, stacked hypothesis-major (B = len(specs) * K); every
    key present for every hypothesis (nominal where one leaves it alone); `ambient` as
    in `draw_unit`; `stream` as in `hypothesis_rng`."""
    blocks = [draw_unit(circuit, s, K, hypothesis_rng(seed, s.id, stream), ambient)
              for s in specs]
    keys = sorted({k for b in blocks for k in b})
    out = {}
    for k in keys:
        nom = float(circuit.nominal[k]) if k in circuit.nominal else np.nan
        out[k] = np.concatenate([np.broadcast_to(np.asarray(b[k], dtype=float), (K,))
                                 if k in b else np.full(K, nom) for b in blocks])
    return out


def reference_draws(R: int, M: int, seed: int, blunders: bool = True
                    ) -> dict[str, np.ndarray]:
    """Random numbers of the goodness-of-fit reference (infer.fit_pvalue): unit index k
    (R,), standard-normal noise z (R, M), blunder decision b and position w, uniform on
    [0, 1) (R, M). Without `blunders` b is 1 everywhere (never below the blunder
    probability): the reference is readings taken without a slip, so a unit that the
    best hypothesis explains only with a blunder reads as not fitting."""
    rng = np.random.default_rng([int(seed), 0xF17])
    z = rng.standard_normal((R, M))
    b = rng.uniform(size=(R, M))
    return {"ref_k": np.arange(R) % max(R, 1), "ref_z": z,
            "ref_b": b if blunders else np.ones((R, M)), "ref_w": rng.uniform(size=(R, M))}


def cache_file(case_hash: str, rules_hash: str, K: int, seed: int, version: str,
               kind: str = "ens") -> Path:
    """Cache file for (case, rules, K, seed, code version) in paths.cache_dir(): the
    ensemble (`ens`, npz) or the stress on linked faults' parts (`stress`, json)."""
    from diag.core.paths import cache_dir

    ext = "npz" if kind == "ens" else "json"
    return cache_dir() / f"{kind}-{case_hash}-{rules_hash}-K{K}-s{seed}-{version}.{ext}"


def save_cache(path: Path, arrays: dict) -> None:
    """Write arrays to an npz file atomically (a partial file is never read)."""
    _atomic(path, lambda fh: np.savez(fh, **arrays))


def save_json_cache(path: Path, obj) -> None:
    """Write a JSON-able object to a cache file atomically, its folder made if need be."""
    import json

    path.parent.mkdir(parents=True, exist_ok=True)
    _atomic(path, lambda fh: fh.write(json.dumps(obj).encode()))


def load_json_cache(path: Path):
    """The object of a JSON cache file, or None when it is missing or unreadable."""
    import json

    try:
        return json.loads(path.read_text())
    except (OSError, ValueError):
        return None


def _atomic(path: Path, write) -> None:
    """Write a file through `write(binary file)` into a temporary name, then rename."""
    tmp = path.with_name(path.name + f".{os.getpid()}.tmp")
    with open(tmp, "wb") as fh:
        write(fh)
    os.replace(tmp, path)


# Ensemble cache files kept (the newest by modification time); every edit of a case or
# of rules/ makes a new one, so older ones are removed when a new one is written.
CACHE_KEEP = 24
# Companions of an ensemble file (ens-....npz beside it, Engine._on_demand): units of
# hypotheses outside the built set (pairs), and further units of leading suspects.
COMPANIONS = ("-extra", "-more")


def prune_cache(folder: Path, keep: int = CACHE_KEEP) -> list[Path]:
    """Remove all but the `keep` newest ensemble files (ens-*.npz) in `folder`, each with
    its COMPANIONS, and all but the `keep` newest
    stress files (stress-*.json); return what was removed. Files that vanish or
    resist removal meanwhile (another process) are left alone."""
    def mtime(p: Path) -> float:
        try:
            return p.stat().st_mtime
        except OSError:
            return 0.0

    main = [p for p in folder.glob("ens-*.npz")
            if not p.name.endswith(tuple(f"{c}.npz" for c in COMPANIONS))]
    main.sort(key=mtime, reverse=True)
    stress = sorted(folder.glob("stress-*.json"), key=mtime, reverse=True)
    old = [q for p in main[keep:]
           for q in (p, *(p.with_name(p.stem + f"{c}.npz") for c in COMPANIONS))]
    gone = []
    for q in old + stress[keep:]:
        try:
            q.unlink()
            gone.append(q)
        except OSError:
            pass
    return gone


def load_cache(path: Path) -> dict | None:
    """Arrays of a cache file, or None when it is missing or unreadable."""
    try:
        with np.load(path, allow_pickle=False) as z:
            return {k: z[k] for k in z.files}
    except (OSError, ValueError, KeyError, EOFError):
        return None
