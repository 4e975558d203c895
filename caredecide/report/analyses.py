"""Run every analysis of a model once and keep its tables: the content of a report.

Each analysis goes through its own module (compile -> solve -> evaluate underneath);
this module only calls them and collects DataFrames. Modules are imported lazily: when
one is missing, or an analysis refuses the model, its section is left out with a note
saying why, and the rest of the report is still produced.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from caredecide.compiled import CompiledModel
from caredecide.errors import CaredecideError
from caredecide.model import Model
from caredecide.objective import Objective

STEPS = ("policy", "strategies", "sensitivity", "scenarios", "uncertainty", "verification")
"""Analyses in report order (``uncertainty`` runs only when draws are asked for)."""


@dataclass
class ReportData:
    """Tables and facts of one run over one model.

    Attributes
    ----------
    model : Model
    model_path : Path
    model_sha256 : str
    objective : Objective
    inputs : dict of str to DataFrame
        Model inputs: settings, states, actions, evidence (every parameter).
    results : dict of str to DataFrame
        Result tables by name (file names of the CSV export).
    facts : dict
        Single figures and sentences (structure summary, EVPI, best strategy...).
    notes : dict of str to str
        Per analysis step, why it is missing or what it could not do.
    draws, seed : int or None
        Probabilistic analysis size and seed (None: not run).
    """

    model: Model
    model_path: Path
    model_sha256: str
    objective: Objective
    inputs: dict[str, pd.DataFrame] = field(default_factory=dict)
    results: dict[str, pd.DataFrame] = field(default_factory=dict)
    facts: dict = field(default_factory=dict)
    notes: dict[str, str] = field(default_factory=dict)
    draws: int | None = None
    seed: int | None = None
    compiled: CompiledModel | None = None
    """The compiled base case (from validation; compiled once)."""
    overrides: dict[str, Any] = field(default_factory=dict)
    """Values set for this run (``--set``), by model-file path."""


# ----------------------------------------------------------------------------- inputs
def _text(value: object) -> str:
    return "" if value is None else str(value)


def _distribution_text(spec) -> str:
    if not spec:
        return "fixed"
    spec = dict(spec)
    kind = spec.pop("type", "?")
    return (
        f"{kind}("
        + ", ".join(
            f"{k}={v:g}" if isinstance(v, int | float) else f"{k}={v}"
            for k, v in sorted(spec.items())
        )
        + ")"
    )


def input_tables(model: Model) -> dict[str, pd.DataFrame]:
    """The model's inputs as tables: settings, states, actions and the evidence table.

    The evidence table has one row per parameter (Dirichlet members included): name,
    label, value (base case), kind, per_years, low, high (the range one-way analysis
    uses), range_from, distribution, source, note.
    """
    from caredecide.sensitivity.variation import parameter_ranges

    s = model.settings
    horizon = (
        "infinite"
        if s.infinite_horizon
        else f"{s.horizon_cycles} cycles"
        if s.horizon_cycles is not None
        else f"until age {s.until_age:g}"
    )
    settings = pd.DataFrame(
        [
            ("cycle_years", s.cycle_years),
            ("horizon", horizon),
            ("start_age", s.start_age),
            ("start", "; ".join(f"{k}: {v:g}" for k, v in model.start_distribution().items())),
            ("discount_outcomes", s.discount_outcomes),
            ("discount_costs", s.discount_costs),
            ("objective", s.objective),
            ("willingness_to_pay", s.willingness_to_pay),
            ("within_cycle", s.within_cycle),
            ("currency", s.currency),
            ("severity_order", ", ".join(s.severity_order)),
        ],
        columns=["setting", "value"],
    ).astype({"value": str})
    states = pd.DataFrame(
        {
            "state": [x.id for x in model.states],
            "label": [x.label for x in model.states],
            "qaly_weight": [_text(x.qaly_weight) for x in model.states],
            "cost": [_text(x.cost) for x in model.states],
            "absorbing": [x.absorbing for x in model.states],
            "alive": [x.alive for x in model.states],
        }
    )
    actions = pd.DataFrame(
        {
            "action": [a.id for a in model.actions],
            "label": [a.label for a in model.actions],
            "allowed_in": [", ".join(model.allowed_states(a)) for a in model.actions],
            "oneoff_cost": [_text(a.oneoff_cost) for a in model.actions],
            "oneoff_qaly_loss": [_text(a.oneoff_qaly_loss) for a in model.actions],
            "cost_per_cycle": [_text(a.cost_per_cycle) for a in model.actions],
        }
    )
    ranges = parameter_ranges(model)
    ranges = ranges.set_index("parameter") if len(ranges) else ranges
    rows = []
    for name in model.parameter_names():
        p = model.parameters.get(name)
        group = next((g for g in model.groups.values() if name in g.members), None)
        if p is not None:
            described = (
                p.label,
                p.kind,
                p.per_years,
                _distribution_text(p.distribution),
                p.source,
                p.note,
            )
        else:
            assert group is not None  # every parameter name is declared or a group member
            counts = ", ".join(f"{c:g}" for c in group.counts)
            described = (
                "",
                f"probability (Dirichlet group {group.name})",
                None,
                f"dirichlet(counts={counts}, prior={group.prior:g})",
                group.source,
                group.note,
            )
        label, kind, per_years, distribution, source, note = described
        r = ranges.loc[name]
        rows.append(
            (
                name,
                label,
                float(r["base"]),
                kind,
                per_years,
                float(r["low"]),
                float(r["high"]),
                r["range_from"],
                distribution,
                source,
                note,
            )
        )
    evidence = pd.DataFrame(
        rows,
        columns=[
            "parameter",
            "label",
            "value",
            "kind",
            "per_years",
            "low",
            "high",
            "range_from",
            "distribution",
            "source",
            "note",
        ],
    )
    return {"settings": settings, "states": states, "actions": actions, "evidence": evidence}


# ----------------------------------------------------------------------------- analyses
def _policy(data: ReportData) -> None:
    from caredecide.analysis.base_case import analyse_base_case
    from caredecide.structure import band_table

    base = analyse_base_case(data.model, objective=data.objective, compiled=data.compiled)
    result, outcome, compiled = base.solution, base.outcome, base.compiled
    data.results["policy"] = base.policy_frame()
    bands = band_table(result)
    data.results["policy_bands"] = bands.reset_index()
    data.results["trace"] = base.trace_frame()
    if compiled.state_groups:  # attributes or tunnels: where each generated state comes from
        from caredecide.grouping import state_group_frame

        data.results["state_groups"] = state_group_frame(compiled)
    data.results["totals"] = base.to_frame()
    data.facts["structure"] = base.structure
    data.facts["solver"] = result.message
    data.facts["value_at_start"] = float(outcome.value[0])
    data.facts["finite_horizon"] = result.finite_horizon
    data.facts["decision_states"] = [
        s for s, d in zip(result.state_ids, result.decision_states, strict=True) if d
    ]


def _strategies(data: ReportData) -> None:
    from caredecide.analysis.others import analyse_strategies

    comparison = analyse_strategies(data.model)
    data.results["strategies"] = comparison.table
    if comparison.frontier is not None:
        data.results["wtp_frontier"] = comparison.frontier
        data.results["wtp_frontier_runs"] = comparison.frontier_collapsed
        data.results["wtp_state_switches"] = comparison.state_switches
        data.results["wtp_regions"] = comparison.regions
    data.facts["best_strategy"] = comparison.best_strategy
    data.facts["strategy_wtp"] = comparison.willingness_to_pay
    if comparison.notes:
        data.notes["strategies"] = "; ".join(comparison.notes)


def _sensitivity(data: ReportData) -> None:
    from caredecide.analysis.sensitivity import analyse_sensitivity
    from caredecide.sensitivity import decision_tornado
    from caredecide.sensitivity.context import threshold_context
    from caredecide.sensitivity.recommendation import what_would_change

    _transition_cells(data)
    if not data.model.parameter_names():
        data.notes["sensitivity"] = "not run: the model has no parameters to vary"
        return
    suite = analyse_sensitivity(data.model, objective=data.objective)
    thresholds = suite.thresholds
    data.results.update(suite.tables())
    data.results["thresholds_summary"] = suite.threshold_summary()
    data.results["thresholds_context"] = threshold_context(data.model, thresholds)
    data.results["decision_tornado"] = decision_tornado(
        data.model, objective=data.objective, thresholds=thresholds
    ).table
    changes = what_would_change(data.model, objective=data.objective, thresholds=thresholds)
    data.results["what_would_change_states"] = changes.recommendations
    data.results["what_would_change_flips"] = changes.flips
    data.results["what_would_change_scenarios"] = changes.scenarios
    if "willingness_to_pay" in suite.setting_thresholds:
        # The summary by age band, as before, under the name the report has always used.
        data.results["threshold_willingness_to_pay"] = suite.threshold_summary("willingness_to_pay")
    if suite.notes:
        data.notes["sensitivity"] = "; ".join(suite.notes)


def _scenarios(data: ReportData) -> None:
    from caredecide.analysis.scenarios import analyse_scenarios

    if not data.model.scenarios and not data.overrides:
        data.notes["scenarios"] = "none: the model file names no [scenarios]"
        return
    data.results["scenarios"] = analyse_scenarios(data.model).to_frame()


def _transition_cells(data: ReportData) -> None:
    """The switching factor of every transition cell (the same table as the CLI's)."""
    from caredecide.sensitivity import cell_sensitivity

    cells = cell_sensitivity(data.model, objective=data.objective)
    data.results["transition_cells"] = cells.to_frame()
    data.results["transition_cells_table"] = cells.summary_table()
    data.results["transition_cells_matrix"] = cells.matrix_frame()


def _uncertainty(data: ReportData) -> None:
    from caredecide.analysis import analyse_uncertainty
    from caredecide.strategies import sibling_table

    assert data.draws is not None  # the step runs only with draws (see run_analyses)
    # The candidates (the built-ins and the table beside the model) are the library's rule.
    psa = analyse_uncertainty(
        data.model,
        data.draws,
        data.seed or 0,
        objective=data.objective,
        table=None if data.model.source_path else sibling_table(data.model_path),
    )
    data.results["psa_acceptability"] = psa.acceptability_by_age_band()
    data.results["psa_expected_loss"] = psa.expected_loss()
    data.results["psa_policy_frequencies"] = psa.policy_frequencies()
    data.results["psa_acceptability_curves"] = psa.acceptability_curves()
    data.results["psa_acceptability_frontier"] = psa.acceptability_frontier()
    data.results["psa_evppi"] = psa.evppi()
    data.results["psa_convergence"] = psa.convergence()
    data.results["psa_strategy_means"] = psa.strategy_summary()
    data.results["psa_plane"] = psa.plane_frame(max_draws=500)
    data.facts["psa_fixed_parameters"] = list(psa.fixed_parameters)
    data.facts["psa_shown_action"] = psa.shown_action
    states = data.results.get("what_would_change_states")
    if states is not None:
        from caredecide.sensitivity.recommendation import share_of_draws_differing

        shares = share_of_draws_differing(psa, psa.candidates[0].policy, len(psa.state_ids))
        index = {s: i for i, s in enumerate(psa.state_ids)}
        states["psa_share_differs"] = [shares[index[s]] for s in states["state"]]
        states["psa_draws"] = psa.n_draws
    evpi = psa.evpi()
    data.results["psa_evpi"] = pd.DataFrame([evpi])
    _best_schedule(data)
    data.facts["psa_distinct_policies"] = len(psa.distinct_counts)
    if not psa.success:
        data.notes["uncertainty"] = "the solver reported a problem: " + "; ".join(psa.messages)


def _best_schedule(data: ReportData) -> None:
    """The one schedule best over the same draws (finite horizon; else a note)."""
    from caredecide.analysis import analyse_best_schedule

    assert data.draws is not None
    try:
        best = analyse_best_schedule(
            data.model, data.draws, data.seed or 0, objective=data.objective
        )
    except CaredecideError as error:
        data.notes["best_schedule"] = f"left out: {str(error).splitlines()[0]}"
        return
    data.results["best_schedule_starts"] = best.to_frame()
    data.results["best_schedule_cells"] = best.differing_cells
    data.results["best_schedule"] = best.policy_frame()
    data.facts["best_schedule_lines"] = best.lines()[:5]
    data.facts["best_schedule_map"] = best.map_frame()


def _verification(data: ReportData) -> None:
    from caredecide.analysis import analyse_verification

    report = analyse_verification(data.model, objective=data.objective)
    data.results["verification"] = report.to_frame()
    data.facts["verification_passed"] = report.passed


_RUNNERS: dict[str, Callable[[ReportData], None]] = {
    "policy": _policy,
    "strategies": _strategies,
    "sensitivity": _sensitivity,
    "scenarios": _scenarios,
    "uncertainty": _uncertainty,
    "verification": _verification,
}


def run_analyses(
    model_path: Path | str,
    *,
    draws: int | None = None,
    seed: int | None = None,
    model: Model | None = None,
    model_sha256: str | None = None,
    progress: Callable[[int, int, str], None] | None = None,
    overrides: Mapping[str, Any] | None = None,
) -> ReportData:
    """Run every analysis of a model file and collect the tables.

    Parameters
    ----------
    model_path : path
        The model file (its SHA-256 identifies the run).
    draws, seed : int, optional
        Probabilistic analysis: number of parameter draws and the seed (both needed;
        without ``draws`` the section is left out with a note).
    model : Model, optional
        The already loaded model of ``model_path`` (default: load it).
    model_sha256 : str, optional
        SHA-256 of the model text (default: of the file ``model_path``); give it with
        ``model`` when the text is not on disk (the app's working model).
    progress : callable(done, total, step), optional

    Returns
    -------
    ReportData

    Raises
    ------
    CaredecideError
        When the model itself cannot be read or solved (the policy step); later steps
        record their error as a note instead.
    """
    from caredecide.modelfile import load_model, validate_and_compile
    from caredecide.modelfile.overrides import with_overrides
    from caredecide.runrecord import sha256_file

    model_path = Path(model_path)
    model = load_model(model_path, validate=False) if model is None else model
    model = with_overrides(model, overrides or {}, validate=False)
    validated = validate_and_compile(model)  # the base case, compiled once
    if model_sha256 is None:
        model_sha256 = sha256_file(model_path)
    data = ReportData(
        model=model,
        model_path=model_path,
        model_sha256=model_sha256,
        objective=Objective.from_settings(model.settings),
        draws=draws,
        seed=seed,
    )
    data.compiled = validated.compiled
    data.overrides = dict(overrides or {})
    data.inputs = input_tables(model)
    data.facts["warnings"] = [str(w) for w in validated.warnings]
    steps = [s for s in STEPS if s != "uncertainty" or draws]
    if not draws:
        data.notes["uncertainty"] = (
            "not run: give --draws N (and --seed S) for the probabilistic analysis"
        )
    for done, step in enumerate(steps):
        try:
            _RUNNERS[step](data)
        except ModuleNotFoundError as error:
            data.notes[step] = f"left out: module {error.name} is not available in this install"
        except CaredecideError as error:
            if step == "policy":
                raise
            data.notes[step] = f"left out: {str(error).splitlines()[0]}"
        if progress is not None:
            progress(done + 1, len(steps), step)
    return data


def result_tables(data: ReportData) -> dict[str, pd.DataFrame]:
    """Every result table, with ``input_*`` tables first (names are CSV file names)."""
    tables = {f"input_{k}": v for k, v in data.inputs.items()}
    tables.update(data.results)
    return tables


def finite_or_none(value: float) -> float | None:
    """JSON-friendly number: None for NaN or infinity."""
    return float(value) if np.isfinite(value) else None
