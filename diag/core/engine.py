"""The façade the command line and the interface share: one Engine per (case, rules).

CONTRACT (stable; other modules code against it):

    eng = Engine(case, rules=None, K=128, seed=0)
    eng.build(progress=None, cancelled=None) -> Ensemble     # cached on disk; progress(f)
                                                             # gets 0..1, cancelled() -> bool
    eng.ensemble -> Ensemble                                 # builds on first use
    eng.diagnose(readings, healthy_prior=None) -> Diagnosis
    eng.bands(fault_id="healthy") -> tuple[Band, ...]        # predicted band per observable
    eng.hypothesis(fault_id) -> Hypothesis
    eng.simulate(fault_id, rng) -> tuple[Reading, ...]       # one drawn unit, every
                                                             # observable, meter error and
                                                             # display resolution applied
    Diagnosis.to_json(case_path, top=None) -> dict           # SPEC section 5

Readings are matched to observables by (point, kind).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any, Callable, Sequence

import numpy as np

from diag.core.case import Case, Observable


@dataclass(frozen=True)
class Hypothesis:
    """One explanation of the unit: `healthy`, a single fault `R2:open`, or a multiple
    fault `Q3:ce-short+R9:open`. `prior` is normalised over the hypothesis set."""

    id: str
    prior: float
    text: str
    confirm: str
    parts: tuple[str, ...] = ()


@dataclass(frozen=True)
class Ensemble:
    """Predicted meter readings of K drawn units per hypothesis.

    samples: (H, K, M) float64, meter reading at each observable (loading included,
    meter error excluded), volts or amperes; NaN where a variant did not converge.
    group: (H,) int, hypotheses no offered reading can tell apart share a number.
    """

    case_hash: str
    rules_hash: str
    observables: tuple[Observable, ...]
    hypotheses: tuple[Hypothesis, ...]
    samples: np.ndarray
    group: np.ndarray


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


@dataclass(frozen=True)
class Suspect:
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
    readings; `rejected` lists readings not used, each with its reason."""

    readings_used: int
    fits: bool
    suspects: tuple[Suspect, ...]
    next: tuple[NextReading, ...]
    notes: tuple[str, ...] = ()
    fit_text: str = ""
    rejected: tuple[str, ...] = ()
    extra: dict = field(default_factory=dict)

    def to_json(self, case_path: str, top: int | None = None) -> dict[str, Any]:
        raise NotImplementedError


class Engine:
    def __init__(self, case: Case, rules=None, K: int = 128, seed: int = 0):
        raise NotImplementedError

    def build(self, progress: Callable[[float], None] | None = None,
              cancelled: Callable[[], bool] | None = None) -> Ensemble:
        raise NotImplementedError

    def diagnose(self, readings: Sequence[Reading],
                 healthy_prior: float | None = None) -> Diagnosis:
        raise NotImplementedError
