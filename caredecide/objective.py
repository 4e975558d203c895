"""What the decision maximises: QALYs, or net monetary benefit at a willingness to pay.

Per cycle boundary the occupancy reward of state ``s`` is
``u_t(s) = lambda * q_t(s) - c_t(s)`` (net benefit) or ``u_t(s) = q_t(s)`` (QALYs), and
the decision reward of action ``a`` is ``g_t(s, a) = lambda * dq_t(s, a) - dc_t(s, a)``
(or ``dq_t(s, a)``). Net monetary benefit is a standard measure (Stinnett & Mullahy
1998, Med Decis Making 18(2 Suppl):S68-S80).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from caredecide.errors import CaredecideError

OBJECTIVE_KINDS = ("qalys", "net_benefit")


class ObjectiveError(CaredecideError, ValueError):
    """An objective is impossible (unknown kind, negative willingness to pay)."""


@dataclass(frozen=True)
class Objective:
    """The quantity the policy maximises.

    Parameters
    ----------
    kind : {"qalys", "net_benefit"}
        ``"qalys"``: discounted QALYs (costs ignored). ``"net_benefit"``: net monetary
        benefit ``lambda * QALYs - costs`` in money.
    willingness_to_pay : float
        ``lambda``, money per QALY (>= 0). Ignored for ``"qalys"``.
    """

    kind: str = "net_benefit"
    willingness_to_pay: float = 0.0

    def __post_init__(self) -> None:
        if self.kind not in OBJECTIVE_KINDS:
            raise ObjectiveError(
                f"objective kind {self.kind!r} is unknown; expected one of {OBJECTIVE_KINDS}"
            )
        wtp = self.willingness_to_pay
        if not isinstance(wtp, int | float) or not math.isfinite(wtp) or wtp < 0:
            raise ObjectiveError(
                f"willingness_to_pay = {wtp!r} is not allowed; expected a finite number >= 0 "
                "(money per QALY)"
            )

    @property
    def outcome_weight(self) -> float:
        """Weight of one QALY in the objective (lambda, or 1 for QALYs)."""
        return 1.0 if self.kind == "qalys" else float(self.willingness_to_pay)

    @property
    def cost_weight(self) -> float:
        """Weight of one unit of cost (1 for net benefit, 0 for QALYs)."""
        return 0.0 if self.kind == "qalys" else 1.0

    @property
    def unit(self) -> str:
        """Unit of values and action gaps: ``"QALYs"`` or ``"money"``."""
        return "QALYs" if self.kind == "qalys" else "money"

    def describe(self) -> str:
        """One-line description, e.g. ``"net monetary benefit at 30000 per QALY"``."""
        if self.kind == "qalys":
            return "discounted QALYs"
        return f"net monetary benefit at {self.willingness_to_pay:g} per QALY"

    @classmethod
    def from_settings(cls, settings: object, willingness_to_pay: float | None = None) -> Objective:
        """The objective a model's ``[settings]`` asks for (``objective``, WTP).

        ``willingness_to_pay`` overrides the model's value when given.
        """
        wtp = getattr(settings, "willingness_to_pay", 0.0)
        return cls(
            kind=getattr(settings, "objective", "net_benefit"),
            willingness_to_pay=float(wtp if willingness_to_pay is None else willingness_to_pay),
        )

    def to_dict(self) -> dict:
        return {"kind": self.kind, "willingness_to_pay": float(self.willingness_to_pay)}
