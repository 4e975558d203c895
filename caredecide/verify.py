"""Black-box verification battery: checks a user's own model through the common core.

Each check transforms the model (a :class:`caredecide.model.Model`, never the arrays
behind the solver's back), compiles it with :func:`caredecide.compile.compile_model`,
solves it with :func:`caredecide.solvers.solve` and evaluates policies with
:func:`caredecide.evaluate.evaluate_policy`, then compares figures whose relation is
known in advance. The checks follow the spirit of published verification checklists:

* Büyükkaramikli et al. 2019, "TECH-VER: a verification checklist to reduce errors in
  models and improve their credibility", PharmacoEconomics 37:1391-1408 (black-box
  tests such as "all utilities 1 gives QALYs = life-years", "discount rates 0 gives
  discounted = undiscounted", "the cohort trace sums to 1", "doubling costs doubles
  costs", extreme-value and "no treatment effect" tests);
* Vemer et al. 2016, "AdViSHE: a validation-assessment tool of health-economic models
  for decision makers and model users", PharmacoEconomics 34:349-361 (verification of
  the computerised model: extreme values, equal inputs give equal outputs).

Checks of our own cover the decision part: the optimal value is at least that of every
fixed strategy and matches the evaluation of its own policy; at zero willingness to pay
the cheapest policy is optimal; for stationary models the iterative solvers agree.

Each check returns a :class:`CheckResult` with status ``"pass"``, ``"fail"`` or
``"not applicable"`` and the figures behind it. See ``docs/verification.md``.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass, field, replace
from typing import TYPE_CHECKING, Any

import numpy as np
import pandas as pd

from caredecide.compiled import CompiledModel
from caredecide.errors import CaredecideError
from caredecide.model import Model
from caredecide.objective import Objective

if TYPE_CHECKING:
    from caredecide.evaluate import PolicyOutcome
    from caredecide.solvers import PolicyResult

PASS = "pass"
FAIL = "fail"
NOT_APPLICABLE = "not applicable"

RELATIVE_TOLERANCE = 1e-9
"""Relative tolerance of the equalities (floating-point round-off; common practice)."""
ABSOLUTE_TOLERANCE = 1e-9
"""Absolute tolerance of the equalities, in the unit of the compared figure."""
QALY_BUMP = 0.05
"""Utility added to one state's QALY weight in the monotonicity check (per year)."""

TECH_VER = "Büyükkaramikli et al. 2019, PharmacoEconomics 37:1391 (TECH-VER)"
ADVISHE = "Vemer et al. 2016, PharmacoEconomics 34:349 (AdViSHE)"
PUTERMAN = "Puterman 1994, Markov Decision Processes, ch. 4 and 6 (from memory)"
NMB_SOURCE = "Stinnett & Mullahy 1998, Med Decis Making 18(2 Suppl):S68-S80"


@dataclass(frozen=True)
class CheckResult:
    """The outcome of one verification check.

    Attributes
    ----------
    check : str
        Identifier (e.g. ``"trace_sums_to_one"``).
    title : str
        What is checked, in words.
    status : {"pass", "fail", "not applicable"}
    figures : str
        The numbers behind the verdict (largest deviation, compared totals, ...).
    expected : str
        What a correct model and code give.
    source : str
        Published checklist or reference the check follows.
    """

    check: str
    title: str
    status: str
    figures: str
    expected: str
    source: str

    @property
    def passed(self) -> bool:
        return self.status != FAIL


@dataclass
class VerificationReport:
    """Every check run on one model."""

    model_title: str
    checks: list[CheckResult] = field(default_factory=list)

    @property
    def passed(self) -> bool:
        """True when no check failed (not-applicable checks do not fail)."""
        return all(c.passed for c in self.checks)

    @property
    def failures(self) -> list[CheckResult]:
        return [c for c in self.checks if c.status == FAIL]

    def to_dict(self) -> dict:
        """The model title, the verdict and one entry per check (JSON-ready)."""
        return {
            "model": self.model_title,
            "passed": self.passed,
            "checks": self.to_frame().to_dict(orient="records"),
        }

    def to_frame(self) -> pd.DataFrame:
        """One row per check: check, title, status, figures, expected, source."""
        columns = ["check", "title", "status", "figures", "expected", "source"]
        return pd.DataFrame(
            [[getattr(c, k) for k in columns] for c in self.checks], columns=columns
        )


# ----------------------------------------------------------------------------- core calls
@dataclass
class _Solved:
    compiled: CompiledModel
    result: PolicyResult
    outcome: PolicyOutcome


def _solve(model: Model, objective: Objective, parameter_sets=None, **options) -> _Solved:
    """Compile, solve and evaluate through the common core (looked up at call time)."""
    from caredecide.batch import solve_and_evaluate

    done = solve_and_evaluate(model, objective, parameter_sets=parameter_sets, **options)
    return _Solved(done.compiled, done.solution, done.outcome)


def _start_values(
    model: Model, objective: Objective, parameter_sets: dict[str, np.ndarray]
) -> tuple[np.ndarray, np.ndarray]:
    """((D, S) optimal value of every state at the start, (S,) start distribution) of D
    parameter sets, compiled and solved chunk by chunk within the memory budget (a large
    model's one batch of 1 + S sets would not fit); only the values are kept."""
    from caredecide.chunks import chunk_ranges, chunk_size_for, run_chunks

    frame = pd.DataFrame(parameter_sets)
    size = chunk_size_for(model, len(frame), evaluations=False)
    job = _StartValuesJob(model, frame, objective)
    pieces = list(run_chunks(job, chunk_ranges(len(frame), size)))
    return np.concatenate([p[0] for p in pieces]), pieces[0][1]


@dataclass(frozen=True)
class _StartValuesJob:
    """Chunk job: compile and solve parameter sets ``start:stop``; keep the values at the
    start (D, S) and the start distribution."""

    model: Model
    parameter_sets: pd.DataFrame
    objective: Objective

    def __call__(self, start: int, stop: int) -> tuple[np.ndarray, np.ndarray]:
        from caredecide.compile import compile_model
        from caredecide.solvers import solve

        compiled = compile_model(self.model, self.parameter_sets.iloc[start:stop])
        result = solve(compiled, self.objective, action_values=False)
        return np.array(result.value[:, 0]), np.asarray(compiled.start_distribution)


def _evaluate(model: Model, objective: Objective, policy: np.ndarray):
    from caredecide.compile import compile_model
    from caredecide.evaluate import evaluate_policy

    return evaluate_policy(compile_model(model), policy, objective)


def _evaluate_fixed(compiled, objective: Objective):
    """Outcome of the built-in fixed strategies (:func:`caredecide.strategies.default_strategies`).

    Returns the :class:`~caredecide.evaluate.PolicyOutcome` of the distinct strategy
    policies (one draw each) and, for each of its rows, the strategy's name.
    """
    from caredecide.strategies import default_strategies, evaluate_policies, resolve_strategy

    resolved = [resolve_strategy(compiled, s) for s in default_strategies(compiled)]
    outcome, index = evaluate_policies(compiled, np.stack([r.policy for r in resolved]), objective)
    names = [""] * outcome.value.shape[0]
    for r, i in zip(resolved[::-1], index[::-1], strict=True):  # first name wins
        names[i] = r.strategy.name
    return outcome, names


def _deviation(a: np.ndarray, b: np.ndarray) -> tuple[float, bool]:
    """Largest |a - b| and whether every pair is within the tolerances."""
    a, b = np.asarray(a, dtype=float), np.asarray(b, dtype=float)
    diff = np.abs(a - b)
    both_inf = np.isinf(a) & np.isinf(b) & (np.sign(a) == np.sign(b))
    diff = np.where(both_inf, 0.0, diff)
    scale = np.maximum(np.abs(np.where(both_inf, 0.0, a)), np.abs(np.where(both_inf, 0.0, b)))
    ok = diff <= ABSOLUTE_TOLERANCE + RELATIVE_TOLERANCE * scale
    return float(np.max(diff, initial=0.0)), bool(np.all(ok))


def _compare(pairs) -> tuple[float, bool]:
    """Largest deviation over ``(a, b)`` pairs and whether every pair agrees."""
    results = [_deviation(a, b) for a, b in pairs]
    return max(w for w, _ in results), all(o for _, o in results)


def _g(x: float) -> str:
    return f"{x:.10g}"


# ----------------------------------------------------------------------------- transforms
def _scaled(expression: object, factor: float) -> float | str:
    """An expression (number or text) multiplied by ``factor`` (text stays text)."""
    if isinstance(expression, int | float):
        return float(expression) * factor
    return f"{factor!r} * ({expression})"


def with_qaly_weights_one(model: Model) -> Model:
    """Alive states weigh 1 per year, one-off QALY losses 0; non-alive states untouched."""
    states = tuple(replace(s, qaly_weight=1.0) if s.alive else s for s in model.states)
    actions = tuple(replace(a, oneoff_qaly_loss=0.0) for a in model.actions)
    return replace(model, states=states, actions=actions)


def with_costs_scaled(model: Model, factor: float) -> Model:
    """Every state cost, one-off cost and per-cycle action cost multiplied by ``factor``."""
    states = tuple(replace(s, cost=_scaled(s.cost, factor)) for s in model.states)
    actions = tuple(
        replace(
            a,
            oneoff_cost=_scaled(a.oneoff_cost, factor),
            cost_per_cycle=_scaled(a.cost_per_cycle, factor),
        )
        for a in model.actions
    )
    return replace(model, states=states, actions=actions)


def with_settings(model: Model, **changes) -> Model:
    return replace(model, settings=replace(model.settings, **changes))


def with_no_effect(model: Model, action_id: str, reference_id: str) -> Model:
    """``action_id`` made identical to ``reference_id`` wherever both are allowed.

    Its transition rows (probabilities or rates), decision-time moves, costs and QALYs
    under the action, one-off cost, one-off QALY loss and per-cycle cost are those of the
    reference action: no effect, cost or harm of its own.
    """
    action = next(a for a in model.actions if a.id == action_id)
    reference = next(a for a in model.actions if a.id == reference_id)
    shared = set(model.allowed_states(action)) & set(model.allowed_states(reference))
    tables: dict[str, Any] = {}
    for name in ("transitions", "rates", "moves", "under_action"):
        table = {k: dict(v) for k, v in getattr(model, name).items()}
        own = {s: row for s, row in table.get(action_id, {}).items() if s not in shared}
        copied = {s: dict(row) for s, row in table.get(reference_id, {}).items() if s in shared}
        rows = {**own, **copied}
        if rows:
            table[action_id] = rows
        else:
            table.pop(action_id, None)
        tables[name] = table
    twin = replace(
        action,
        oneoff_cost=reference.oneoff_cost,
        oneoff_qaly_loss=reference.oneoff_qaly_loss,
        cost_per_cycle=reference.cost_per_cycle,
    )
    actions = tuple(twin if a.id == action_id else a for a in model.actions)
    return replace(model, actions=actions, **tables)


def with_qaly_bumps(model: Model) -> tuple[Model, list[str]]:
    """Add one zero-valued parameter per state to its QALY weight (for a batch of bumps).

    Returns the model and the added parameter names (one per state, in state order).
    """
    from caredecide.model import Parameter

    taken = set(model.parameter_names())
    names = []
    for i in range(len(model.states)):
        name = f"verify_qaly_bump_{i}"
        while name in taken:
            name += "_"
        names.append(name)
    parameters = dict(model.parameters)
    for name in names:
        parameters[name] = Parameter(name=name, value=0.0, source="caredecide verify (internal)")
    states = tuple(
        replace(s, qaly_weight=f"({s.qaly_weight}) + {name}")
        for s, name in zip(model.states, names, strict=True)
    )
    return replace(model, parameters=parameters, states=states), names


# ----------------------------------------------------------------------------- the checks
Check = Callable[[Model, Objective], tuple[str, str]]
_CHECKS: list[tuple[str, str, str, str, Check]] = []


def _register(check_id: str, title: str, expected: str, source: str):
    def decorate(function):
        _CHECKS.append((check_id, title, expected, source, function))
        return function

    return decorate


def _result(check_id: str, status: str, figures: str) -> CheckResult:
    for cid, title, expected, source, _ in _CHECKS:
        if cid == check_id:
            return CheckResult(cid, title, status, figures, expected, source)
    raise KeyError(check_id)


@_register(
    "trace_sums_to_one",
    "The cohort trace sums to 1 in every cycle",
    "|sum of shares - 1| <= 1e-9 at every boundary, optimal and fixed policies",
    TECH_VER,
)
def check_trace_sums_to_one(model: Model, objective: Objective) -> tuple[str, str]:
    solved = _solve(model, objective)
    fixed, _ = _evaluate_fixed(solved.compiled, objective)
    sums = np.concatenate(
        [solved.outcome.trace.sum(axis=-1).ravel(), fixed.trace.sum(axis=-1).ravel()]
    )
    worst, ok = _deviation(sums, np.ones_like(sums))
    return (
        PASS if ok else FAIL,
        f"largest |sum - 1| = {worst:.3g} over {sums.size} boundaries "
        f"(optimal policy and {fixed.trace.shape[0]} fixed strategies)",
    )


@_register(
    "probabilities_in_range",
    "No probability leaves [0, 1] at any age, also at every parameter's low and high value",
    "every transition probability in [0, 1] and every row summing to 1, at the base "
    "case and with each parameter at either end of its plausible range",
    ADVISHE,
)
def check_probabilities_in_range(model: Model, objective: Objective) -> tuple[str, str]:
    from caredecide.compile import compile_model
    from caredecide.sensitivity.variation import one_at_a_time_sets, parameter_ranges

    ranges = parameter_ranges(model)
    if len(ranges):
        frame = one_at_a_time_sets(
            model, list(ranges["parameter"]), ranges[["low", "high"]].to_numpy()
        )
    else:  # a model without parameters: the base case is the only parameter set
        frame = pd.DataFrame()
    try:
        compiled = compile_model(model, frame if len(frame) else None)
    except CaredecideError as error:
        first = str(error).splitlines()[0]
        return FAIL, (
            f"{max(len(frame), 1)} parameter sets (each parameter at low and high): {first}"
        )
    held = compiled.sparse_transition
    if held is None:
        P = compiled.transition
        rows = P.sum(axis=-1)
        low, high = float(P.min()), float(P.max())
    else:  # compiled in sparse rows: the same figures from the non-zeros
        rows = held.row_sums()
        low, high = held.value_range()
    worst_row, rows_ok = _deviation(rows, np.ones_like(rows))
    ok = rows_ok and low >= 0.0 and high <= 1.0
    return (
        PASS if ok else FAIL,
        f"{compiled.n_draws} parameter sets x {rows.shape[1]} cycle(s): probabilities in "
        f"[{_g(low)}, {_g(high)}]; largest |row sum - 1| = {worst_row:.3g}",
    )


@_register(
    "closed_cohort",
    "Closed cohort: nobody returns from death; deaths plus survivors equal the starting cohort",
    "the share in non-alive states never decreases and alive + dead = 1 at every boundary",
    TECH_VER,
)
def check_closed_cohort(model: Model, objective: Objective) -> tuple[str, str]:
    solved = _solve(model, objective)
    fixed, _ = _evaluate_fixed(solved.compiled, objective)
    alive = np.array([s.alive for s in model.states], dtype=bool)
    drop, worst, ok = 0.0, 0.0, True
    # Infinite horizons: each display trace has its own length, so take them one by one.
    for trace in (solved.outcome.trace, fixed.trace):  # (D, T + 1, S)
        dead = trace[..., ~alive].sum(axis=-1)
        drop = max(drop, float(np.max(-np.diff(dead, axis=1), initial=0.0)))
        w, o = _deviation(dead + trace[..., alive].sum(axis=-1), np.ones_like(dead))
        worst, ok = max(worst, w), ok and o
    ok = ok and drop <= ABSOLUTE_TOLERANCE
    dead = solved.outcome.trace[0, :, ~alive].sum(axis=0)
    survivors = solved.outcome.trace[0, :, alive].sum(axis=0)
    end_dead, end_alive = float(dead[-1]), float(survivors[-1])
    return (
        PASS if ok else FAIL,
        f"largest fall of the dead share = {drop:.3g}; largest |alive + dead - 1| = "
        f"{worst:.3g}; optimal policy at the end: dead {_g(end_dead)} + alive "
        f"{_g(end_alive)}",
    )


@_register(
    "qaly_weights_one",
    "All QALY weights 1 (no one-off losses) gives QALYs = life-years",
    "QALYs equal life-years, discounted and undiscounted, for the optimal and every fixed policy",
    TECH_VER,
)
def check_qaly_weights_one(model: Model, objective: Objective) -> tuple[str, str]:
    changed = with_qaly_weights_one(model)
    solved = _solve(changed, objective)
    fixed, _ = _evaluate_fixed(solved.compiled, objective)
    worst, ok = _compare(
        pair
        for o in (solved.outcome, fixed)
        for pair in ((o.qalys, o.life_years), (o.qalys_undiscounted, o.life_years_undiscounted))
    )
    o = solved.outcome
    return (
        PASS if ok else FAIL,
        f"optimal policy: QALYs {_g(o.qalys[0])} vs life-years {_g(o.life_years[0])} "
        f"(discounted); largest difference {worst:.3g} over all policies",
    )


@_register(
    "zero_discount",
    "Zero discount rates give discounted = undiscounted totals",
    "with both rates 0, discounted totals equal the undiscounted totals of the same "
    "policy in the original model",
    TECH_VER,
)
def check_zero_discount(model: Model, objective: Objective) -> tuple[str, str]:
    if model.n_cycles() is None:
        return NOT_APPLICABLE, "an infinite horizon needs a positive discount rate"
    base = _solve(model, objective)
    policy = base.result.policy
    undiscounted = _evaluate(
        with_settings(model, discount_outcomes=0.0, discount_costs=0.0), objective, policy
    )
    worst, ok = _compare(
        (getattr(undiscounted, name), getattr(source, f"{name}_undiscounted"))
        for name in ("life_years", "qalys", "costs")
        for source in (undiscounted, base.outcome)
    )
    return (
        PASS if ok else FAIL,
        f"QALYs at rate 0: {_g(undiscounted.qalys[0])}; undiscounted in the original model: "
        f"{_g(base.outcome.qalys_undiscounted[0])}; costs {_g(undiscounted.costs[0])} vs "
        f"{_g(base.outcome.costs_undiscounted[0])}; largest difference {worst:.3g}",
    )


@_register(
    "zero_costs",
    "Zero costs give net monetary benefit = WTP x QALYs",
    "with every cost 0: total costs 0 and NMB = WTP x QALYs for the optimal and every fixed policy",
    f"{TECH_VER}; {NMB_SOURCE}",
)
def check_zero_costs(model: Model, objective: Objective) -> tuple[str, str]:
    wtp = (
        objective.willingness_to_pay
        if objective.kind == "net_benefit"
        else float(model.settings.willingness_to_pay)
    )
    nmb_objective = Objective("net_benefit", float(wtp))
    solved = _solve(with_costs_scaled(model, 0.0), nmb_objective)
    fixed, _ = _evaluate_fixed(solved.compiled, nmb_objective)
    worst, ok = _compare(
        pair
        for o in (solved.outcome, fixed)
        for pair in ((o.net_monetary_benefit, wtp * o.qalys), (o.costs, np.zeros_like(o.costs)))
    )
    o = solved.outcome
    return (
        PASS if ok else FAIL,
        f"WTP {_g(wtp)}: NMB {_g(o.net_monetary_benefit[0])} vs WTP x QALYs "
        f"{_g(wtp * o.qalys[0])}; costs {_g(o.costs[0])}; largest difference {worst:.3g}",
    )


@_register(
    "costs_double",
    "Doubling every cost doubles total costs",
    "costs (discounted and undiscounted) of the base-case optimal policy double; QALYs "
    "do not change",
    TECH_VER,
)
def check_costs_double(model: Model, objective: Objective) -> tuple[str, str]:
    base = _solve(model, objective)
    doubled = _evaluate(with_costs_scaled(model, 2.0), objective, base.result.policy)
    worst, ok = _compare(
        [
            (doubled.costs, 2.0 * base.outcome.costs),
            (doubled.costs_undiscounted, 2.0 * base.outcome.costs_undiscounted),
            (doubled.qalys, base.outcome.qalys),
        ]
    )
    return (
        PASS if ok else FAIL,
        f"costs {_g(base.outcome.costs[0])} -> {_g(doubled.costs[0])} (x "
        f"{_g(doubled.costs[0] / base.outcome.costs[0]) if base.outcome.costs[0] else 'n/a'}"
        f"); largest deviation from exact doubling {worst:.3g}",
    )


@_register(
    "qaly_weight_monotone",
    "Raising a state's QALY weight never lowers the optimal value",
    f"each state's weight raised by {QALY_BUMP} per year (one batch): the "
    "optimal value of every state at the start is not lower",
    PUTERMAN,
)
def check_qaly_weight_monotone(model: Model, objective: Objective) -> tuple[str, str]:
    bumped, names = with_qaly_bumps(model)
    n = len(names)
    sets = {
        name: np.where(np.arange(n + 1) == i + 1, QALY_BUMP, 0.0) for i, name in enumerate(names)
    }  # row 0 = base case, row i + 1 bumps state i
    value, start_distribution = _start_values(bumped, objective, sets)  # (1 + S, S), (S,)
    change = value[1:] - value[:1]
    scale = np.abs(value).max()
    worst = float(change.min())
    ok = worst >= -(ABSOLUTE_TOLERANCE + RELATIVE_TOLERANCE * scale)
    start = value @ start_distribution
    return (
        PASS if ok else FAIL,
        f"{n} states bumped; smallest change of any state's optimal value = {_g(worst)} "
        f"(start value {_g(start[0])} -> {_g(start[1:].min())} .. {_g(start[1:].max())})",
    )


@_register(
    "no_effect_ties",
    "A treatment with no effect, cost or harm ties with the reference action",
    "each action made identical to the first action where both "
    "are allowed: equal action values, reported as indifferent",
    f"{TECH_VER}; {ADVISHE}",
)
def check_no_effect_ties(model: Model, objective: Objective) -> tuple[str, str]:
    if len(model.actions) < 2:
        return NOT_APPLICABLE, "the model has a single action"
    reference = model.actions[0]
    worst, ok, flagged, cells = 0.0, True, True, 0
    for action in model.actions[1:]:  # a handful of model variants, not a numerical loop
        solved = _solve(with_no_effect(model, action.id, reference.id), objective)
        r = solved.result
        a = model.action_ids.index(action.id)
        both = np.asarray(solved.compiled.allowed)[:, [0, a]].all(axis=1) & ~np.asarray(
            solved.compiled.absorbing, dtype=bool
        )
        q = np.asarray(r.q_values)[..., both, :]  # solved with action values kept
        w, o = _deviation(q[..., a], q[..., 0])
        worst, ok = max(worst, w), ok and o
        flagged = flagged and bool(r.indifferent[..., both].all())
        cells += int(q[..., 0].size)
    return (
        PASS if ok and flagged else FAIL,
        f"largest |Q(action) - Q({reference.id})| = {worst:.3g} over {cells} state-cycles; "
        f"all reported indifferent: {'yes' if flagged else 'no'}",
    )


@_register(
    "optimal_beats_fixed",
    "The optimal value is at least that of every fixed strategy",
    "value of the optimal policy >= value of every built-in fixed strategy "
    "(never / at once / from each ordered state)",
    PUTERMAN,
)
def check_optimal_beats_fixed(model: Model, objective: Objective) -> tuple[str, str]:
    solved = _solve(model, objective)
    fixed, names = _evaluate_fixed(solved.compiled, objective)
    best = float(solved.outcome.value[0])
    margin = best - fixed.value
    bound = float(np.max(solved.result.error_bound, initial=0.0))
    tolerance = ABSOLUTE_TOLERANCE + RELATIVE_TOLERANCE * abs(best) + bound
    ok = bool((margin >= -tolerance).all())
    listing = "; ".join(f"{n}: {_g(v)}" for n, v in zip(names, fixed.value, strict=True))
    return (
        PASS if ok else FAIL,
        f"optimal {_g(best)}; {listing}; smallest margin {_g(float(margin.min()))}",
    )


@_register(
    "zero_wtp_cheapest",
    "At zero willingness to pay the cheapest policy is optimal",
    "net benefit at WTP 0: the optimal policy costs no more than any fixed strategy",
    f"{NMB_SOURCE}; {PUTERMAN}",
)
def check_zero_wtp_cheapest(model: Model, objective: Objective) -> tuple[str, str]:
    zero = Objective("net_benefit", 0.0)
    solved = _solve(model, zero)
    fixed, names = _evaluate_fixed(solved.compiled, zero)
    cost = float(solved.outcome.costs[0])
    bound = float(np.max(solved.result.error_bound, initial=0.0))
    tolerance = ABSOLUTE_TOLERANCE + RELATIVE_TOLERANCE * abs(cost) + bound
    ok = bool((fixed.costs >= cost - tolerance).all())
    return (
        PASS if ok else FAIL,
        f"optimal cost {_g(cost)}; cheapest fixed strategy "
        f"({names[int(np.argmin(fixed.costs))]}) {_g(float(fixed.costs.min()))}",
    )


@_register(
    "value_matches_evaluation",
    "The solver's value equals the evaluation of its own policy",
    "value at the start from the Bellman recursion = total from the "
    "cohort trace under the same policy",
    PUTERMAN,
)
def check_value_matches_evaluation(model: Model, objective: Objective) -> tuple[str, str]:
    solved = _solve(model, objective)
    recursion = solved.result.expected_value(solved.compiled.start_distribution)
    bound = float(np.max(solved.result.error_bound, initial=0.0))
    diff = float(np.abs(recursion - solved.outcome.value).max())
    ok = diff <= ABSOLUTE_TOLERANCE + RELATIVE_TOLERANCE * float(np.abs(recursion).max()) + bound
    return (
        PASS if ok else FAIL,
        f"recursion {_g(recursion[0])} vs trace {_g(solved.outcome.value[0])}; "
        f"difference {diff:.3g} (solver bound {bound:.3g})",
    )


@_register(
    "solvers_agree",
    "The solvers agree on a stationary model",
    "value iteration, policy iteration and modified policy iteration: same policy "
    "(except reported ties) and values within their error bounds",
    PUTERMAN,
)
def check_solvers_agree(model: Model, objective: Objective) -> tuple[str, str]:
    if model.n_cycles() is not None:
        return NOT_APPLICABLE, "finite horizon: backward induction is exact and the only method"
    methods = ("policy_iteration", "value_iteration", "modified_policy_iteration")
    results = [_solve(model, objective, method=m, tolerance=1e-12).result for m in methods]
    ref = results[0]
    worst, ok = 0.0, True
    for other in results[1:]:
        same = (other.policy == ref.policy) | other.indifferent | ref.indifferent
        gap = float(np.abs(other.value - ref.value).max())
        bound = float(other.error_bound.max() + ref.error_bound.max())
        scale = float(np.abs(ref.value).max())
        ok = (
            ok
            and bool(same.all())
            and gap <= bound + ABSOLUTE_TOLERANCE + RELATIVE_TOLERANCE * scale
        )
        worst = max(worst, gap)
    return (
        PASS if ok else FAIL,
        f"largest value difference {worst:.3g}; sweeps "
        + ", ".join(f"{m} {r.iterations}" for m, r in zip(methods, results, strict=True)),
    )


CHECK_IDS: tuple[str, ...] = tuple(c[0] for c in _CHECKS)


def verify_model(
    model: Model,
    *,
    objective: Objective | None = None,
    checks: Sequence[str] | None = None,
    progress: Callable[[int, int, str], None] | None = None,
) -> VerificationReport:
    """Run the verification battery on a validated model.

    Parameters
    ----------
    model : caredecide.model.Model
        A validated model (:func:`caredecide.modelfile.load_model`).
    objective : Objective, optional
        Default: the model file's objective and willingness to pay.
    checks : sequence of str, optional
        Subset of :data:`CHECK_IDS` (default: all, in that order).
    progress : callable(done, total, check_id), optional

    Returns
    -------
    VerificationReport
        A check that raises one of caredecide's errors fails with the message as figures.
    """
    objective = Objective.from_settings(model.settings) if objective is None else objective
    chosen = CHECK_IDS if checks is None else tuple(checks)
    unknown = [c for c in chosen if c not in CHECK_IDS]
    if unknown:
        raise CaredecideError(
            f"unknown verification check(s) {unknown}; expected any of {list(CHECK_IDS)}"
        )
    from caredecide.expand import expand_model

    model = expand_model(model)  # the checks read states one by one: use the flat states
    report = VerificationReport(model_title=model.title)
    for done, (check_id, _, _, _, function) in enumerate(c for c in _CHECKS if c[0] in chosen):
        try:
            status, figures = function(model, objective)
        except CaredecideError as error:
            status, figures = FAIL, f"error: {str(error).splitlines()[0]}"
        report.checks.append(_result(check_id, status, figures))
        if progress is not None:
            progress(done + 1, len(chosen), check_id)
    return report
