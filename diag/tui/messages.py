"""Events the interface's widgets and workers post: small dataclasses named for what
happened. Workers post them from their threads (post_message is thread-safe)."""

from __future__ import annotations

from dataclasses import dataclass

from textual.message import Message

from diag.core.engine import Band, Diagnosis, Reading


@dataclass
class ReadingEntered(Message):
    """A value was typed at (point, kind) and passed validation."""

    reading: Reading


@dataclass
class ReadingRejected(Message):
    """A typed value failed validation; `why` says what is wrong and what to do."""

    point: str
    kind: str
    text: str
    why: str


@dataclass
class EnsembleProgressed(Message):
    """The prediction build advanced; `fraction` is 0..1 (of the background step
    after the ensemble when `refining`)."""

    fraction: float
    refining: bool = False


@dataclass
class EnsembleBuilt(Message):
    """The predictions for every hypothesis are ready; `healthy` is the healthy band at
    every observable, in case order; `refining` when the further units of some
    hypotheses (Engine._refine) are still to be solved in the background."""

    healthy: tuple[Band, ...]
    refining: bool = False


@dataclass
class PredictionsRefined(Message):
    """Every hypothesis's further units are solved (the background step is done)."""


@dataclass
class EnsembleFailed(Message):
    """The prediction build stopped with an error a user can read (`refining`: in the
    background step, which the ranking does without)."""

    why: str
    refining: bool = False


@dataclass
class RankingUpdated(Message):
    """A new diagnosis for the readings of update number `serial`. `advised` is False
    for the ranking alone (its next readings follow in a second message)."""

    serial: int
    diagnosis: Diagnosis
    advised: bool = True


@dataclass
class CasePicked(Message):
    """The picker chose a case file to open."""

    path: str
