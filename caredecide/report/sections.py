"""Pieces of the HTML report: escaped tables, inline SVG charts, and one builder per section.

Every piece of model text (titles, labels, sources, notes, expressions) is user content
and passes through :func:`html.escape`. Charts come from ``caredecide/charts.py`` builders and
are rendered to inline SVG by vl-convert, so the report needs no network to be viewed.
"""

from __future__ import annotations

import functools
import html
import math
from collections.abc import Callable, Sequence
from functools import partial
from typing import Any

import pandas as pd

from caredecide.cautions import caution_long, caution_short
from caredecide.report.analyses import ReportData

SECTION_TITLES: dict[str, str] = {
    "cautions": "Before you read",
    "job": "The question",
    "structure": "Model structure",
    "evidence": "Evidence",
    "policy": "Best policy",
    "changes": "What would change the recommendation",
    "strategies": "Comparison with fixed strategies",
    "sensitivity": "Sensitivity and thresholds",
    "uncertainty": "Probabilistic results",
    "verification": "Verification checks",
    "run-record": "Run record",
}
"""Section ids (HTML anchors, in order) and their headings."""

MAX_ROWS = 60
"""Rows shown per table in the page; the CSV export holds every row."""


def esc(value: object) -> str:
    """Escaped text of any value."""
    return html.escape(str(value), quote=True)


def number(value: object) -> str:
    """A readable number: thousands separators for large values, 6 significant digits."""
    if isinstance(value, bool) or value is None:
        return "" if value is None else ("yes" if value else "no")
    if isinstance(value, int):
        return f"{value:,}"
    if isinstance(value, float):
        if math.isnan(value):
            return ""
        if math.isinf(value):
            return "inf" if value > 0 else "-inf"
        return f"{value:,.2f}" if abs(value) >= 1000 else f"{value:.6g}"
    return str(value)


def table(
    frame: pd.DataFrame,
    columns: Sequence[str] | None = None,
    *,
    max_rows: int = MAX_ROWS,
    index: bool = False,
    css_class: str = "",
) -> str:
    """An escaped HTML table of ``frame`` (first ``max_rows`` rows, a note when cut)."""
    if index:
        frame = frame.reset_index()
    if columns is not None:
        frame = frame[[c for c in columns if c in frame.columns]]
    head = "".join(f"<th>{esc(c)}</th>" for c in frame.columns)
    rows = []
    for row in frame.head(max_rows).itertuples(index=False, name=None):
        cells = []
        for value in row:
            value = value.item() if hasattr(value, "item") else value
            numeric = isinstance(value, int | float) and not isinstance(value, bool)
            cells.append(
                f'<td class="num">{esc(number(value))}</td>'
                if numeric
                else f"<td>{esc(number(value))}</td>"
            )
        rows.append("<tr>" + "".join(cells) + "</tr>")
    cut = (
        f'<p class="cut">Showing {max_rows} of {len(frame)} rows; the CSV export has all '
        "of them.</p>"
        if len(frame) > max_rows
        else ""
    )
    klass = f' class="{esc(css_class)}"' if css_class else ""
    return (
        f'<div class="scroll"><table{klass}><thead><tr>{head}</tr></thead><tbody>'
        + "".join(rows)
        + f"</tbody></table></div>{cut}"
    )


def svg(build: Callable[[], Any]) -> str:
    """Inline SVG of the chart ``build()`` returns; a note when it cannot be drawn."""
    try:
        import vl_convert

        chart = build()
        markup = vl_convert.vegalite_to_svg(chart.to_dict())
    except Exception as error:  # a chart must never stop the report
        return f'<p class="note">Chart not drawn: {esc(type(error).__name__)}: {esc(error)}</p>'
    return f'<figure class="chart">{markup}</figure>'


def note(text: str) -> str:
    return f'<p class="note">{esc(text)}</p>'


def unit_text(data: ReportData) -> str:
    """Unit of the objective: QALYs, or the model's currency (``money`` when none is set)."""
    if data.objective.unit == "money" and data.model.settings.currency:
        return data.model.settings.currency
    return data.objective.unit


def _para(text: str) -> str:
    return f"<p>{esc(text)}</p>"


# ----------------------------------------------------------------------------- sections
def cautions_section(data: ReportData) -> str:
    return (
        f'<div class="caution"><strong>{esc(caution_short(data.model_path))}</strong>'
        f"<p>{esc(caution_long(data.model_path))}</p></div>"
    )


def job_section(data: ReportData) -> str:
    model = data.model
    parts = [f"<h3>{esc(model.title)}</h3>"]
    if model.description:
        parts.append(f'<p class="description">{esc(model.description.strip())}</p>')
    horizon = model.n_cycles()
    parts.append(
        _para(
            f"Decision: which action to take in each health state at each age, chosen to "
            f"maximise {data.objective.describe()}"
            + (
                f" over {horizon} cycles of {model.settings.cycle_years:g} year(s)."
                if horizon is not None
                else " over an infinite horizon (stationary model)."
            )
        )
    )
    warnings = data.facts.get("warnings", [])
    if warnings:
        items = "".join(f"<li>{esc(w)}</li>" for w in warnings)
        parts.append(
            f'<div class="caution"><strong>The model has {len(warnings)} warning(s)</strong>'
            f"<ul>{items}</ul><p>Check them before using the results.</p></div>"
        )
    return "".join(parts)


def structure_section(data: ReportData) -> str:
    return (
        "<h3>States</h3>"
        + table(data.inputs["states"])
        + "<h3>Actions and where they are allowed</h3>"
        + table(data.inputs["actions"])
        + "<h3>Settings</h3>"
        + table(data.inputs["settings"])
    )


def evidence_section(data: ReportData) -> str:
    return _para(
        "Every estimate the model uses, with its plausible range (used by the "
        "one-way analysis), its distribution (used by the probabilistic analysis) "
        "and where it comes from."
    ) + table(data.inputs["evidence"], max_rows=500)


def _policy_chart(data: ReportData):
    from caredecide.charts import make_policy_chart

    frame = data.results["policy"]
    decision = data.facts["decision_states"]
    labels = {a.id: a.label or a.id for a in data.model.actions}
    choices = frame[frame["state"].isin(decision)].copy()
    if data.facts["finite_horizon"]:
        choices["age"] = choices["age"].round(2)
    else:
        choices["age"] = "any age"
    starts = choices["action"] != choices.groupby("state")["action"].shift()
    choices = choices.assign(
        label=choices["action"].where(starts, ""), action=choices["action"].map(labels)
    )
    return make_policy_chart(
        choices, action_order=[labels[a] for a in data.model.action_ids], state_order=decision
    )


def _trace_chart(data: ReportData):
    from caredecide.charts import make_trace_chart
    from caredecide.expand import expand_model

    states = expand_model(data.model).state_ids  # one per copy of an attribute or tunnel
    return make_trace_chart(data.results["trace"], state_order=list(states))


def policy_section(data: ReportData) -> str:
    return (
        f'<p class="headline">{esc(data.facts["structure"])}</p>'
        + _para(
            f"Solver: {data.facts['solver']}. Objective at the start: "
            f"{number(data.facts['value_at_start'])} ({unit_text(data)})."
        )
        + "<h3>Best action by state and age band</h3>"
        + table(data.results["policy_bands"])
        + svg(lambda: _policy_chart(data))
        + "<h3>Totals per person under the best policy</h3>"
        + table(data.results["totals"])
        + "<h3>Cohort trace</h3>"
        + svg(lambda: _trace_chart(data))
        + _grouped_traces(data)
    )


def _grouped_traces(data: ReportData) -> str:
    """One cohort trace per attribute and tunnel, its generated states added up."""
    from caredecide.charts import make_trace_chart
    from caredecide.grouping import trace_by_group

    groups = data.results.get("state_groups")
    if groups is None:
        return ""
    parts = []
    for name in [c for c in groups.columns if c not in ("state_id", "label")]:
        frame = trace_by_group(data.results["trace"], groups, name)
        title = "declared state" if name == "state" else esc(name)
        parts.append(f"<h3>Cohort trace by {title}</h3>")
        parts.append(svg(functools.partial(make_trace_chart, frame)))
    return "".join(parts)


def _switch_chart(data: ReportData):
    from caredecide.decision_charts import make_region_map_chart

    labels = [a.label or a.id for a in data.model.actions]
    currency = data.model.settings.currency
    return make_region_map_chart(
        data.results["wtp_regions"],
        x_title=f"Willingness to pay per QALY {f'({currency})' if currency else ''}".strip(),
        action_labels=labels,
        base=data.facts.get("strategy_wtp"),
        title="Best action by age as the willingness to pay rises (one panel per state)",
    )


def strategies_section(data: ReportData) -> str:
    from caredecide.charts import make_ce_plane_chart

    frame = data.results["strategies"]
    columns = [
        "strategy",
        "cost",
        "qalys",
        "life_years",
        "status",
        "incremental_cost",
        "incremental_qalys",
        "icer",
        "net_monetary_benefit",
    ]
    parts = [
        _para(
            f"Incremental analysis (Cantor 1994) at a willingness to pay of "
            f"{number(data.facts['strategy_wtp'])} per QALY; best: "
            f"{data.facts['best_strategy']}."
        ),
        table(frame, columns),
        svg(lambda: make_ce_plane_chart(frame, currency=data.model.settings.currency)),
    ]
    if "wtp_frontier" in data.results:
        parts += ["<h3>Policies optimal over a range of willingness to pay</h3>"]
        if "wtp_regions" in data.results:
            parts.append(svg(lambda: _switch_chart(data)))
        if "wtp_state_switches" in data.results:
            parts += [
                _para("Where each state's recommendation changes as the willingness to pay rises:"),
                table(data.results["wtp_state_switches"]),
            ]
        runs = data.results.get("wtp_frontier_runs", data.results["wtp_frontier"])
        columns = [c for c in ("policies", "policy", "wtp_from", "wtp_to", "cost", "qalys")
                   if c in runs.columns]  # fmt: skip
        parts.append(table(runs, columns))
    return "".join(parts)


def changes_section(data: ReportData) -> str:
    """Per state: the recommendation, the estimates that could flip it, how likely."""
    from types import SimpleNamespace

    from caredecide.sensitivity.recommendation import flip_sentence

    states = data.results["what_would_change_states"]
    flips = data.results["what_would_change_flips"]
    parts = [
        _para(
            "For each health state: what the model recommends, which estimates could flip "
            "it inside their plausible ranges and at which values, and the probability of a "
            "value beyond that point under the estimate's own distribution (every other "
            "estimate at its base value)."
        )
    ]
    for row in states.itertuples():
        parts.append(f"<h3>{esc(row.state_label)}</h3>")
        parts.append(_para(f"Recommended: {row.recommended}."))
        items = [
            f"<li>{esc(flip_sentence(SimpleNamespace(**flip._asdict())))}</li>"
            for flip in flips[flips["state"] == row.state].itertuples()
        ]
        scenarios = data.results.get("what_would_change_scenarios")
        if scenarios is not None:
            items += [
                f"<li>{esc(f'Scenario {s.scenario!r} changes it: {s.recommended}.')}</li>"
                for s in scenarios[scenarios["state"] == row.state].itertuples()
            ]
        parts.append(
            f"<ul>{''.join(items)}</ul>"
            if items
            else _para("No estimate flips it inside its plausible range.")
        )
        share = getattr(row, "psa_share_differs", float("nan"))
        if share == share:  # not NaN: a probabilistic analysis ran
            parts.append(
                _para(
                    f"With every estimate uncertain together, {share:.1%} of "
                    f"{int(row.psa_draws):,} probabilistic draws recommend something else here."
                )
            )
    return "".join(parts)


def sensitivity_section(data: ReportData) -> str:
    from caredecide.charts import make_tornado_chart
    from caredecide.decision_charts import make_decision_tornado_chart
    from caredecide.sensitivity.decision import LOSS_SOURCE

    one = data.results["oneway"]
    decision = data.results.get("decision_tornado")
    parts = []
    if decision is not None:
        parts += [
            "<h3>Decision tornado: value lost by keeping the base-case policy</h3>",
            _para(
                "For each estimate at the low and at the high end of its range: the value "
                "lost (per person, discounted) by keeping today's policy instead of the policy "
                "best at that value; ranked by the mean of the two ends, the expected value of "
                f"perfect information about the estimate alone at its bounds ({LOSS_SOURCE})."
            ),
            svg(lambda: make_decision_tornado_chart(decision, unit=unit_text(data))),
            table(
                decision,
                [
                    "rank",
                    "parameter",
                    "base",
                    "low",
                    "high",
                    "loss_low",
                    "loss_high",
                    "loss_at_bounds",
                    "loss_qalys_at_bounds",
                    "share_cells_changed",
                    "nearest_threshold",
                    "distance_share",
                    "value_rank",
                ],
            ),
            "<h3>Value-level tornado (second view)</h3>",
        ]
    parts += [
        svg(lambda: make_tornado_chart(one, unit=f"({unit_text(data)})")),
        "<h3>One-way analysis, ranked by swing</h3>",
        table(
            one,
            [
                "rank",
                "parameter",
                "low",
                "high",
                "value_low",
                "value_base",
                "value_high",
                "swing",
                "policy_changes",
                "rule",
            ],
        ),
        "<h3>Decision thresholds</h3>",
        _para(
            "The value of an estimate at which the best action switches, by state "
            "and age band (root-finding on the action gap)."
        ),
        table(data.results.get("thresholds_context", data.results["thresholds_summary"])),
    ]
    if "threshold_willingness_to_pay" in data.results:
        parts += [
            "<h3>Willingness-to-pay thresholds</h3>",
            table(data.results["threshold_willingness_to_pay"]),
        ]
    return "".join(parts) + transition_cells_part(data) + scenarios_part(data)


def scenarios_part(data: ReportData) -> str:
    """The base case and the model's named scenarios side by side (when it has any)."""
    if "scenarios" not in data.results:
        return ""
    return (
        "<h3>Scenarios</h3>"
        + _para(
            "Each scenario changes the listed values of the model file. The ICER compares, "
            "under the scenario's assumptions, its optimal policy with the base-case policy "
            "kept unchanged."
        )
        + table(data.results["scenarios"])
    )


def transition_cells_part(data: ReportData) -> str:
    """The transition sensitivity matrix (one per action) and its table."""
    from caredecide.charts import make_cell_matrix_chart
    from caredecide.expand import expand_model

    if "transition_cells_table" not in data.results:
        return ""
    matrix = data.results["transition_cells_matrix"]
    states = list(expand_model(data.model).state_ids)
    parts = [
        "<h3>Transition cells</h3>",
        _para(
            "Each transition cell multiplied by a factor (a rate cell: its rate, before the "
            "matrix exponential; the row's remainder absorbs the change, or its other entries "
            "are rescaled in proportion). Shown: the factor below and above 1 at which the "
            "best policy first changes in some state or age, nearest to 1 first, and the value "
            "lost by keeping the base-case policy at two factors. A cell that changes with age "
            "is multiplied by the same factor at every age."
        ),
    ]
    for action in dict.fromkeys(matrix["action"]):
        parts.append(svg(partial(make_cell_matrix_chart, matrix, action, state_order=states)))
    parts.append(table(data.results["transition_cells_table"]))
    return "".join(parts)


def uncertainty_section(data: ReportData) -> str:
    from caredecide.charts import (
        make_acceptability_curves_chart,
        make_evppi_chart,
        make_policy_acceptability_chart,
    )
    from caredecide.expand import expand_model

    evpi = data.results["psa_evpi"].iloc[0]
    unit = unit_text(data)
    action = str(data.facts["psa_shown_action"])  # PSAResult.shown_action
    parts = [
        _para(
            f"{data.draws} parameter draws, seed {data.seed}. EVPI of the timing "
            f"decision: {number(float(evpi['evpi']))} (Monte Carlo s.e. "
            f"{number(float(evpi['mc_se']))}) {unit} per person, an upper bound as the "
            f"best policy is sought among the candidates below (best: "
            f"{evpi['best_candidate']}); among the candidates alone "
            f"{number(float(evpi['evpi_among_candidates']))} (s.e. "
            f"{number(float(evpi['mc_se_among_candidates']))})."
        ),
        "<h3>Probabilistic means per strategy</h3>",
        _para(
            "Mean cost and QALYs over the draws with 95% percentile intervals; ICER as the "
            "ratio of mean differences against the reference. Parameters held fixed at their "
            "base value (no distribution): "
            + (", ".join(data.facts.get("psa_fixed_parameters", [])) or "none")
            + "."
        ),
        table(data.results["psa_strategy_means"]) if "psa_strategy_means" in data.results else "",
        svg(lambda: _plane(data)) if "psa_plane" in data.results else "",
        "<h3>Expected loss of each candidate policy</h3>",
        table(data.results["psa_expected_loss"]),
        "<h3>Share of draws in which each action is best</h3>",
        svg(
            lambda: make_policy_acceptability_chart(
                data.results["psa_acceptability"],
                action=action,
                state_order=list(expand_model(data.model).state_ids),
            )
        ),
        table(data.results["psa_acceptability"]),
        "<h3>Acceptability curves</h3>",
        svg(
            lambda: make_acceptability_curves_chart(
                data.results["psa_acceptability_curves"],
                data.results.get("psa_acceptability_frontier"),
                currency=data.model.settings.currency,
            )
        ),
    ]
    if "psa_policy_frequencies" in data.results:
        distinct = data.facts.get("psa_distinct_policies", "?")
        parts += [
            f"<h3>Most frequent optimal policies ({esc(distinct)} distinct across the draws)</h3>",
            table(data.results["psa_policy_frequencies"]),
        ]
    parts.append("<h3>The best schedule given what is not known</h3>")
    if "best_schedule_starts" in data.results:
        from caredecide.charts import make_policy_chart

        parts += [
            "".join(_para(line) for line in data.facts["best_schedule_lines"]),
            svg(lambda: make_policy_chart(data.facts["best_schedule_map"])),
            note("Cells marked * differ from the base-case schedule."),
            table(data.results["best_schedule_cells"]),
            table(data.results["best_schedule_starts"]),
        ]
    else:
        parts.append(note(data.notes.get("best_schedule", "not run")))
    evppi = data.results.get("psa_evppi")
    parts.append("<h3>Expected value of partial perfect information</h3>")
    if evppi is not None and len(evppi) and evppi["evppi"].notna().any():
        parts += [
            svg(lambda: make_evppi_chart(evppi, unit=f"({unit})")),
            table(
                evppi,
                ["parameter", "members", "evppi", "mc_se", "share_of_evpi", "method", "message"],
            ),
        ]
    else:
        from caredecide.uncertainty.psa import MIN_EVPPI_DRAWS

        parts.append(
            note(
                f"EVPPI not computed: it needs at least {MIN_EVPPI_DRAWS} draws and "
                "two candidate policies."
            )
        )
    return "".join(parts)


def _plane(data: ReportData):
    from caredecide.decision_charts import make_draws_plane_chart

    return make_draws_plane_chart(data.results["psa_plane"], currency=data.model.settings.currency)


def verification_section(data: ReportData) -> str:
    frame = data.results["verification"]
    failed = int((frame["status"] == "fail").sum())
    verdict = (
        "Every check passed or does not apply."
        if failed == 0
        else f"{failed} check(s) FAILED: read the figures before using the results."
    )
    rows = []
    for row in frame.itertuples(index=False):
        rows.append(
            f'<tr class="{esc(row.status.replace(" ", "-"))}"><td>{esc(row.title)}</td>'
            f"<td><strong>{esc(row.status)}</strong></td><td>{esc(row.figures)}</td>"
            f"<td>{esc(row.expected)}</td><td>{esc(row.source)}</td></tr>"
        )
    return (
        f'<p class="headline">{esc(verdict)}</p><div class="scroll"><table class="checks">'
        "<thead><tr><th>check</th><th>result</th><th>figures</th><th>expected</th>"
        "<th>following</th></tr></thead><tbody>" + "".join(rows) + "</tbody></table></div>"
    )


def run_record_section(data: ReportData, record: dict) -> str:
    rows = [
        ("model file", str(data.model_path)),
        ("model sha256", data.model_sha256),
        ("command", record.get("command_line", "")),
        ("seed", record.get("seed")),
        ("draws", data.draws),
        ("date (UTC)", record.get("date", "")),
    ]
    rows += [(f"input file: {k}", f"sha256 {v}") for k, v in record.get("input_files", {}).items()]
    rows += [(f"version: {k}", v) for k, v in record.get("versions", {}).items()]
    frame = pd.DataFrame(rows, columns=["item", "value"]).astype({"value": str})
    return table(frame, max_rows=100)


SECTION_BUILDERS: dict[str, Callable[[ReportData], str]] = {
    "cautions": cautions_section,
    "job": job_section,
    "structure": structure_section,
    "evidence": evidence_section,
    "policy": policy_section,
    "changes": changes_section,
    "strategies": strategies_section,
    "sensitivity": sensitivity_section,
    "uncertainty": uncertainty_section,
    "verification": verification_section,
}
