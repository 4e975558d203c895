"""The health-state model as plain, immutable dataclasses.

A :class:`Model` is what a model file says, nothing more: numbers stay numbers and
expressions stay their source text (``str``). Parsing expressions, checking them and
turning the model into arrays is done by :mod:`caredecide.modelfile` (validation) and
:mod:`caredecide.compile`. Every dataclass is frozen, so ``dataclasses.replace`` and
:meth:`Model.with_parameter_values` give edited copies without touching the original.

Units: ``cycle_years`` in years; ``qaly_weight`` is utility per *year* (QALYs per cycle
= weight x ``cycle_years``); ``State.cost`` and ``Action.cost_per_cycle`` are per
*cycle*; discount rates are *annual*.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any

import numpy as np

FORMAT_VERSION = 2
"""The model-file format this code reads and writes."""

ExpressionText = float | str
"""A number, or an expression in the model's expression language (kept as its source)."""

ALL_STATES = "all"
"""``Action.allowed_in`` value meaning every non-absorbing state."""

OBJECTIVES = ("qalys", "net_benefit")
PARAMETER_KINDS = (
    "probability",
    "rate",
    "relative_risk",
    "hazard_ratio",
    "odds_ratio",
    "qaly_weight",
    "cost",
    "count",
    "other",
)


@dataclass(frozen=True)
class Settings:
    """The ``[settings]`` table: cycle, horizon, cohort start, discounting, objective.

    Exactly one of ``horizon_cycles``, ``until_age`` and ``infinite_horizon`` defines
    the horizon (validation enforces this).
    """

    cycle_years: float = 1.0
    """Cycle length in years (> 0)."""
    horizon_cycles: int | None = None
    until_age: float | None = None
    """Run the cohort until this age (years); needs ``start_age``."""
    infinite_horizon: bool = False
    """Written ``horizon = "infinite"``: a stationary model solved to convergence."""
    start_age: float = 0.0
    """Age of the cohort at the model start (years)."""
    start: str | Mapping[str, float] = ""
    """A state id (the whole cohort starts there) or ``{state: share}`` summing to 1."""
    discount_outcomes: float = 0.0
    """Annual discount rate for QALYs and life-years, in [0, 1)."""
    discount_costs: float = 0.0
    """Annual discount rate for costs, in [0, 1)."""
    objective: str = "net_benefit"
    """``"qalys"`` (maximise QALYs) or ``"net_benefit"`` (maximise WTP x QALYs - costs)."""
    willingness_to_pay: float = 0.0
    """Money per QALY (>= 0), used by the net-benefit objective."""
    within_cycle: str = "trapezoid"
    """Within-cycle method: ``"start"``, ``"end"``, ``"trapezoid"``, ``"half_cycle"`` or
    ``"simpson"`` (:func:`caredecide.compiled.cycle_weights`)."""
    currency: str = ""
    """Label only (e.g. ``"EUR"``); no conversion is done."""
    severity_order: tuple[str, ...] = ()
    """State ids in clinical order (mildest first), for policy summaries."""


@dataclass(frozen=True)
class State:
    """One ``[[states]]`` entry."""

    id: str
    label: str = ""
    qaly_weight: ExpressionText = 0.0
    """Utility per year spent in the state (QALYs per cycle = weight x cycle_years)."""
    cost: ExpressionText = 0.0
    """Cost per cycle spent in the state."""
    absorbing: bool = False
    alive: bool = True
    """Life-years accrue only in alive states; the file default is ``not absorbing``."""
    negative_cost_allowed: bool = False
    attributes: tuple[str, ...] = ()
    """Names of ``[attributes]`` this state varies by: one copy per combination of values
    (expanded by :mod:`caredecide.expand`)."""
    tunnels: tuple[str, ...] = ()
    """Names of ``[tunnels]`` counted in this state: one copy per step of each tunnel."""


@dataclass(frozen=True)
class StateAttribute:
    """One ``[attributes.<name>]`` entry: a property that states can vary by.

    ``values`` maps each value name (used in generated state ids) to the number that
    expressions read under the attribute's name, e.g. ``{"untreated": 0, "treated": 1}``.
    """

    name: str
    values: Mapping[str, float]
    label: str = ""


@dataclass(frozen=True)
class Scenario:
    """A ``[scenarios.<name>]`` entry: a named set of overrides of model-file values.

    ``overrides`` maps a path of the model file (``settings.discount_costs``,
    ``parameters.hr_treatment.value``, ``states.stage_2.cost``) to its value in the
    scenario; every other value is the base case's.
    """

    name: str
    overrides: Mapping[str, Any]
    label: str = ""
    note: str = ""


@dataclass(frozen=True)
class Tunnel:
    """One ``[tunnels.<name>]`` entry: whole cycles spent since entering a group of states.

    A state listing the tunnel is copied once per step ``0 .. length``; expressions read
    the step under the tunnel's name. Step 0 is the first cycle after entering; each
    cycle moves the cohort one step on, and the last step (``length``, meaning "length
    or more") keeps itself. ``only_for`` limits the tunnel to the copies with these
    attribute values (``{"on_treatment": "treated"}``).
    """

    name: str
    length: int
    only_for: Mapping[str, str] = field(default_factory=dict)
    label: str = ""


@dataclass(frozen=True)
class Action:
    """One ``[[actions]]`` entry: a choice available at the start of a cycle."""

    id: str
    label: str = ""
    allowed_in: tuple[str, ...] | str = ALL_STATES
    """State ids where the action may be chosen, or ``"all"`` (every non-absorbing state)."""
    oneoff_cost: ExpressionText = 0.0
    """Cost charged in the cycle the action is taken."""
    oneoff_qaly_loss: ExpressionText = 0.0
    """QALYs lost in the cycle the action is taken (e.g. toxicity); positive = a loss."""
    cost_per_cycle: ExpressionText = 0.0
    """Cost charged each cycle the action is chosen."""


@dataclass(frozen=True)
class Parameter:
    """One ``[parameters.<name>]`` entry: a published estimate and its uncertainty."""

    name: str
    value: float
    source: str
    """Where the figure comes from (required: every parameter must be traceable)."""
    kind: str = "other"
    per_years: float | None = None
    """For probabilities and rates: the period (years) the published figure refers to."""
    low: float | None = None
    """Lower end of the plausible range (one-way analysis); default: 2.5% quantile."""
    high: float | None = None
    distribution: Mapping[str, Any] | None = None
    """Distribution spec (``{"type": "beta", "mean": 0.1, "se": 0.02}``); None = fixed."""
    label: str = ""
    note: str = ""


@dataclass(frozen=True)
class DirichletGroup:
    """A ``[groups.<name>]`` entry: parameters that share one multinomial row.

    Member ``i`` has base value ``(counts[i] + prior) / (sum(counts) + k * prior)``
    (the Dirichlet mean, Briggs, Ades & Price 2003) and is *not* declared in
    ``[parameters]``.
    """

    name: str
    members: tuple[str, ...]
    counts: tuple[float, ...]
    source: str = ""
    prior: float = 0.0
    note: str = ""

    @property
    def alpha(self) -> np.ndarray:
        """(k,) read-only concentration parameters ``counts + prior``.

        A member with alpha 0 (never observed, no prior) is always 0.
        """
        alpha = np.array(self.alphas(), dtype=float)
        alpha.setflags(write=False)
        return alpha

    def mean(self) -> np.ndarray:
        """(k,) expected proportions ``alpha_i / sum(alpha)``."""
        return self.alpha / self.alpha.sum()

    def variance(self) -> np.ndarray:
        """(k,) variances ``alpha_i (A - alpha_i) / (A^2 (A + 1))``, ``A = sum(alpha)``."""
        alpha = self.alpha
        total = alpha.sum()
        return alpha * (total - alpha) / (total**2 * (total + 1.0))

    def sample(self, rng: np.random.Generator, n: int) -> np.ndarray:
        """(n, k) draws; every row sums to 1."""
        from caredecide.distributions import check_draw_request

        check_draw_request(rng, n)
        return rng.dirichlet(self.alpha, size=n)

    def to_spec(self) -> dict[str, Any]:
        """The distribution as a table, ``{"type": "dirichlet", "counts": {...}, "prior": p}``.

        ``prior`` is left out when it is 0 (its default).
        """
        spec: dict[str, Any] = {
            "type": "dirichlet",
            "counts": dict(zip(self.members, self.counts, strict=True)),
        }
        if self.prior:
            spec["prior"] = self.prior
        return spec

    def alphas(self) -> tuple[float, ...]:
        """Dirichlet concentration parameters ``counts + prior``."""
        return tuple(c + self.prior for c in self.counts)

    def mean_values(self) -> dict[str, float]:
        """Base value of each member: the Dirichlet mean."""
        alphas = self.alphas()
        total = sum(alphas)
        return {
            m: (a / total if total > 0 else math.nan)
            for m, a in zip(self.members, alphas, strict=True)
        }


@dataclass(frozen=True)
class MortalitySpec:
    """The ``[mortality]`` table: background mortality by age.

    Either a life table (``table`` path relative to the model file, read into
    ``table_ages``/``table_probabilities``) or Gompertz-Makeham constants
    ``(a, b, c)`` with hazard ``mu(x) = a + b c^x`` per year.
    """

    table: str | None = None
    table_ages: tuple[float, ...] = ()
    table_probabilities: tuple[float, ...] = ()
    """Annual death probability at each age of ``table_ages``."""
    gompertz_makeham: tuple[float, float, float] | None = None
    source: str = ""


@dataclass(frozen=True)
class Model:
    """A whole model file. See ``docs/model-file.md`` for every field."""

    title: str
    settings: Settings
    states: tuple[State, ...]
    actions: tuple[Action, ...]
    transitions: Mapping[str, Mapping[str, Mapping[str, ExpressionText]]] = field(
        default_factory=dict
    )
    """``transitions[action][from_state][to_state]`` = probability per cycle (or "rest")."""
    rates: Mapping[str, Mapping[str, Mapping[str, ExpressionText]]] = field(default_factory=dict)
    """``rates[action][from_state][to_state]`` = rate per year (competing exits)."""
    moves: Mapping[str, Mapping[str, Mapping[str, ExpressionText]]] = field(default_factory=dict)
    """``moves[action][from_state][to_state]`` = share of the cohort the action moves there
    when it is taken, before the cycle's transitions (decision-time move; "rest" allowed)."""
    under_action: Mapping[str, Mapping[str, Mapping[str, ExpressionText]]] = field(
        default_factory=dict
    )
    """``under_action[action][state]`` = ``{"cost": per cycle, "qaly_weight_change": per
    year}``: occupancy rewards of the state for the cohort that took the action."""
    parameters: Mapping[str, Parameter] = field(default_factory=dict)
    groups: Mapping[str, DirichletGroup] = field(default_factory=dict)
    mortality: MortalitySpec | None = None
    attributes: Mapping[str, StateAttribute] = field(default_factory=dict)
    """State attributes (``[attributes]``); states listing them are expanded before compiling."""
    tunnels: Mapping[str, Tunnel] = field(default_factory=dict)
    scenarios: Mapping[str, Scenario] = field(default_factory=dict)
    """Named scenarios (``[scenarios.<name>]``), in file order."""
    """Tunnels (``[tunnels]``); states listing them are expanded before compiling."""
    derived: Mapping[str, ExpressionText] = field(default_factory=dict)
    """Named intermediate expressions (``[derived]``): ``name -> expression``, defined
    once and usable in any expression (:mod:`caredecide.derived`)."""
    description: str = ""
    format_version: int = FORMAT_VERSION
    rate_row_clock: Mapping[str, Mapping[str, Mapping[str, str]]] = field(default_factory=dict)
    """Set by :mod:`caredecide.expand` in a flat model only (never read from a file):
    ``rate_row_clock[action][source][reached] = at_end`` for a ``[rates]`` row of a copy
    inside a tunnel. Within a cycle a tunnel's step stays where it was at the cycle start;
    the cohort that started the cycle in ``source`` and is in copy ``reached`` after the
    exponential ends the cycle in ``at_end`` (its tunnel steps one on)."""
    source_path: Path | None = field(default=None, compare=False)
    """The file the model was read from (for messages and relative paths); not compared."""

    # -- names ---------------------------------------------------------------------
    @property
    def state_ids(self) -> tuple[str, ...]:
        return tuple(s.id for s in self.states)

    @property
    def action_ids(self) -> tuple[str, ...]:
        return tuple(a.id for a in self.actions)

    def state(self, state_id: str) -> State:
        """The state with this id (KeyError naming it when unknown)."""
        for s in self.states:
            if s.id == state_id:
                return s
        raise KeyError(f"unknown state {state_id!r}; states are {list(self.state_ids)}")

    def allowed_states(self, action: Action) -> tuple[str, ...]:
        """States where ``action`` may be chosen (``"all"`` expanded, absorbing excluded)."""
        if isinstance(action.allowed_in, str):
            if action.allowed_in == ALL_STATES:
                return tuple(s.id for s in self.states if not s.absorbing)
            return (action.allowed_in,)
        return tuple(action.allowed_in)

    @property
    def file_label(self) -> str:
        """The file name for messages (``"<model>"`` when built in memory)."""
        return str(self.source_path) if self.source_path is not None else "<model>"

    # -- horizon -------------------------------------------------------------------
    def n_cycles(self) -> int | None:
        """Number of cycles in the horizon; ``None`` for an infinite horizon."""
        s = self.settings
        if s.infinite_horizon:
            return None
        if s.horizon_cycles is not None:
            return int(s.horizon_cycles)
        if s.until_age is not None:
            # Tolerance so that e.g. (100 - 55) / 0.25 does not round up to an extra cycle.
            return max(0, math.ceil((s.until_age - s.start_age) / s.cycle_years - 1e-9))
        raise ValueError("the model has no horizon (horizon_cycles, until_age or infinite)")

    def start_distribution(self) -> dict[str, float]:
        """Cohort shares at the model start, ``{state id: share}``."""
        start = self.settings.start
        if isinstance(start, str):
            return {start: 1.0}
        return {k: float(v) for k, v in start.items()}

    # -- parameters ----------------------------------------------------------------
    def parameter_names(self) -> tuple[str, ...]:
        """Declared parameters, then Dirichlet group members."""
        members = tuple(m for g in self.groups.values() for m in g.members)
        return tuple(self.parameters) + members

    def base_parameter_values(self) -> dict[str, float]:
        """Base-case value of every parameter, group members included."""
        values = {name: float(p.value) for name, p in self.parameters.items()}
        for group in self.groups.values():
            values.update(group.mean_values())
        return values

    def parameter_range(self, name: str) -> tuple[float, float]:
        """Plausible range ``(low, high)`` of a parameter for one-way analysis.

        Explicit ``low``/``high`` win; otherwise the 2.5% and 97.5% quantiles of the
        parameter's distribution (the marginal beta of a Dirichlet member); a fixed
        parameter without a range gives ``(value, value)``.
        """
        if name in self.parameters:
            p = self.parameters[name]
            low, high = p.low, p.high
            if (low is None or high is None) and p.distribution is not None:
                from caredecide.distributions import distribution_from_spec

                dist = distribution_from_spec(
                    p.distribution, where=f"parameters.{name}.distribution"
                )
                low = float(dist.quantile(0.025)) if low is None else low
                high = float(dist.quantile(0.975)) if high is None else high
            return (
                p.value if low is None else float(low),
                p.value if high is None else float(high),
            )
        for group in self.groups.values():
            if name in group.members:
                from scipy import stats

                alphas = group.alphas()
                a_i = alphas[group.members.index(name)]
                # Marginal of a Dirichlet: Beta(a_i, a_0 - a_i) (Briggs, Ades & Price 2003).
                marginal = stats.beta(a_i, sum(alphas) - a_i)
                return (float(marginal.ppf(0.025)), float(marginal.ppf(0.975)))
        raise KeyError(f"unknown parameter {name!r}; parameters are {list(self.parameter_names())}")

    def with_parameter_values(self, values: Mapping[str, float]) -> Model:
        """A copy whose declared parameters take new base values.

        Raises ``KeyError`` for an unknown name and ``ValueError`` for a Dirichlet member
        (change the group's counts instead).
        """
        members = {m for g in self.groups.values() for m in g.members}
        new = dict(self.parameters)
        for name, value in values.items():
            if name in members:
                raise ValueError(
                    f"parameter {name!r} is a member of a Dirichlet group; change the group counts"
                )
            if name not in new:
                raise KeyError(
                    f"unknown parameter {name!r}; parameters are {list(self.parameters)}"
                )
            new[name] = replace(new[name], value=float(value))
        return replace(self, parameters=new)
