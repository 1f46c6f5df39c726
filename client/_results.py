"""Estimates and gate results as plain Python values, with Python enums.

The wire contract's messages carry enums as integers (``VERDICT_PASS == 1``); a Python
caller compares against :class:`Verdict`, :class:`EstimatorMode` and :class:`BoundKind`
instead. Each is a ``StrEnum`` whose value is the word the CLI and the JSON output use:
``str(Verdict.PASS) == "pass"``, ``BoundKind.FIXED_TIME == "fixed-time"``.
"""

from __future__ import annotations

import dataclasses
import enum
from dataclasses import dataclass
from typing import Any

from leadline.client._errors import LeadlineError
from leadline.v1 import leadline_pb2

__all__ = ["BoundKind", "Estimate", "EstimatorMode", "GateResult", "Verdict"]


class Verdict(enum.StrEnum):
    """A gate's answer."""

    PASS = "pass"
    FAIL = "fail"
    UNDECIDED = "undecided"


class EstimatorMode(enum.StrEnum):
    """How the estimate combines observed losses and the surrogate (docs/estimation.md)."""

    UNBIASED = "unbiased"
    SURROGATE = "surrogate"
    BALANCED = "balanced"


class BoundKind(enum.StrEnum):
    """Which bound a gate decides on: valid however often it is polled, or at one look."""

    ANYTIME = "anytime"
    FIXED_TIME = "fixed-time"


def _member(enum_type: type[enum.StrEnum], proto_enum: Any, number: int) -> Any:
    """The Python member for a proto enum number, e.g. ESTIMATOR_MODE_BALANCED -> BALANCED."""
    prefix = proto_enum.DESCRIPTOR.values[0].name.removesuffix("UNSPECIFIED")
    try:
        return enum_type[proto_enum.Name(number).removeprefix(prefix)]
    except (KeyError, ValueError):
        raise LeadlineError(
            f"the server answered {enum_type.__name__} {number}, which this client does not "
            "know; upgrade the leadline client to the server's version."
        ) from None


@dataclass(frozen=True)
class Estimate:
    """A risk estimate with its bounds (the ``Estimate`` message, with Python enums).

    From ``get_estimate`` and ``get_estimate_trace`` every interval is two-sided at
    ``confidence``: [lower, upper] covers the risk with that probability. Inside a
    :class:`GateResult` (``one_sided`` is True) each bound is one-sided at ``confidence``:
    the risk lies above ``upper`` with probability at most 1 - confidence, and below
    ``lower`` likewise; that is what a gate decides on.
    """

    risk: float
    std_error: float
    lower: float
    upper: float
    anytime_lower: float
    anytime_upper: float
    bias_bound: float
    mode: EstimatorMode
    confidence: float
    items_in_scope: int
    labels_used: int
    labels_pending: int
    labels_skipped: int
    surrogate_version: int
    nonresponse_allowance: float
    items_unreached: int
    unbiased_weight: float
    loss_bound: float
    one_sided: bool = False

    @classmethod
    def from_message(cls, message: leadline_pb2.Estimate, *, one_sided: bool = False) -> Estimate:
        values = {
            f.name: getattr(message, f.name)
            for f in dataclasses.fields(cls)
            if f.name not in ("mode", "one_sided")
        }
        return cls(
            **values,
            mode=_member(EstimatorMode, leadline_pb2.EstimatorMode, message.mode),
            one_sided=one_sided,
        )

    @property
    def sides(self) -> str:
        """'one-sided' or 'two-sided': how each bound holds at ``confidence``."""
        return "one-sided" if self.one_sided else "two-sided"

    def to_dict(self) -> dict[str, Any]:
        """Flat JSON-ready values: plain numbers, enum words."""
        values = dataclasses.asdict(self)
        values["mode"] = str(self.mode)
        values.pop("one_sided")
        values["sides"] = self.sides
        return values


@dataclass(frozen=True)
class GateResult:
    """A gate's verdict, the one-sided bounds it rests on, and what it was asked.

    ``lower`` and ``upper`` are the bounds of the kind the gate used (``bound``), each
    one-sided at ``estimate.confidence``: PASS when ``upper < max_risk``, FAIL when
    ``lower > max_risk``, UNDECIDED otherwise. ``more_labels_hint`` never exceeds the
    unlabeled items in scope; when it equals that count, even labeling all of them may
    not decide the gate (``labels_may_not_suffice``).
    """

    verdict: Verdict
    estimate: Estimate
    bound: BoundKind
    max_risk: float
    more_labels_hint: int
    reason: str

    @classmethod
    def from_message(cls, message: leadline_pb2.GateResult, *, max_risk: float) -> GateResult:
        return cls(
            verdict=_member(Verdict, leadline_pb2.Verdict, message.verdict),
            estimate=Estimate.from_message(message.estimate, one_sided=True),
            bound=_member(BoundKind, leadline_pb2.BoundKind, message.bound),
            max_risk=max_risk,
            more_labels_hint=message.more_labels_hint,
            reason=message.reason,
        )

    @property
    def lower(self) -> float:
        """One-sided lower bound of the kind the gate used (FAIL when above max_risk)."""
        est = self.estimate
        return est.anytime_lower if self.bound is BoundKind.ANYTIME else est.lower

    @property
    def upper(self) -> float:
        """One-sided upper bound of the kind the gate used (PASS when below max_risk)."""
        est = self.estimate
        return est.anytime_upper if self.bound is BoundKind.ANYTIME else est.upper

    @property
    def unlabeled(self) -> int:
        """Items in scope without a label."""
        return max(self.estimate.items_in_scope - self.estimate.labels_used, 0)

    @property
    def labels_may_not_suffice(self) -> bool:
        """UNDECIDED, and even labeling every unlabeled item in scope may not decide it."""
        return self.verdict is Verdict.UNDECIDED and self.more_labels_hint >= self.unlabeled

    def to_dict(self) -> dict[str, Any]:
        """Flat JSON-ready values (see the README's "JSON output" for the stable keys)."""
        est = self.estimate
        return {
            "verdict": str(self.verdict),
            "max_risk": self.max_risk,
            "confidence": est.confidence,
            "bound": str(self.bound),
            "sides": "one-sided",
            "lower": self.lower,
            "upper": self.upper,
            "risk": est.risk,
            "std_error": est.std_error,
            "mode": str(est.mode),
            "bias_bound": est.bias_bound,
            "unbiased_weight": est.unbiased_weight,
            "nonresponse_allowance": est.nonresponse_allowance,
            "loss_bound": est.loss_bound,
            "items_in_scope": est.items_in_scope,
            "items_unreached": est.items_unreached,
            "labels_used": est.labels_used,
            "labels_pending": est.labels_pending,
            "labels_skipped": est.labels_skipped,
            "surrogate_version": est.surrogate_version,
            "more_labels_hint": self.more_labels_hint,
            "labels_may_not_suffice": self.labels_may_not_suffice,
            "reason": self.reason,
        }
