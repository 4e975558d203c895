"""Estimates -> model-file parameters, with the data source recorded.

* Count-based estimates become one Dirichlet group per from-state
  (``[groups.<prefix>from_<state>]``, members ``<prefix>p_<from>_<to>``, counts as
  observed, optional prior; Briggs, Ades & Price 2003). Destinations with zero
  Dirichlet weight are left out (a Dirichlet needs positive parameters); a row with
  fewer than two remaining destinations is left out with a note.
* Panel estimates become rate parameters ``<prefix>rate_<from>_<to>`` (kind ``rate``,
  per year) with a lognormal distribution from the log-scale standard error and the
  Wald 95% interval as the one-way range, plus ``<prefix>hr_treatment`` when estimated.
  Put the rates in ``[rates.<action>.<from_state>]`` rows so that competing exits are
  converted together by the matrix exponential. The file format stores each
  distribution on its own, so correlations between the estimated rates are not kept
  (:meth:`PanelEstimate.sample_log_parameters` keeps them).

Treated-group count estimates and names get the suffix ``_treated``.
"""

from __future__ import annotations

import re
from collections.abc import Sequence
from dataclasses import dataclass, field, replace
from pathlib import Path

import numpy as np

from caredecide.errors import ModelError, Problem
from caredecide.estimation.counts import CountEstimate
from caredecide.estimation.panel import PanelEstimate
from caredecide.guarded import read_limited_text
from caredecide.limits import MAX_MODEL_BYTES
from caredecide.model import DirichletGroup, Model, Parameter
from caredecide.modelfile import IDENTIFIER

COUNT_METHOD = (
    "transition counts over one cycle, maximum likelihood n_ij / n_i, Dirichlet(counts + "
    "prior) per row (Briggs, Ades & Price 2003)"
)
FRAGMENT_HEADER = "# Transition estimates from patient records (research use only).\n"
PANEL_METHOD = (
    "panel maximum likelihood of continuous-time rates, expm likelihood over visit pairs "
    "and exact death times (Kalbfleisch & Lawless 1985); lognormal from the log-scale "
    "standard error (observed information)"
)


@dataclass(frozen=True)
class EstimatedParameters:
    """Parameter and Dirichlet-group entries ready for a model file."""

    parameters: dict[str, Parameter] = field(default_factory=dict)
    groups: dict[str, DirichletGroup] = field(default_factory=dict)
    notes: tuple[str, ...] = ()
    """What was left out and why."""


def _name(text: str) -> str:
    """A state id made safe for a parameter name (ASCII letters, digits, underscores)."""
    return re.sub(r"[^A-Za-z0-9_]", "_", text)


def check_prefix(prefix: str) -> None:
    """The prefix starts every name, so it must itself be a valid name (or empty)."""
    if prefix and not IDENTIFIER.match(prefix):
        raise ModelError(
            Problem(
                where="prefix",
                message=f"value {prefix!r}; expected letters, digits and _ (not starting "
                "with a digit), or empty",
            )
        )


def _count_entries(estimate: CountEstimate, prefix: str) -> EstimatedParameters:
    suffix = "" if estimate.group == "untreated" else f"_{estimate.group}"
    source = (
        f"Estimated from {estimate.source} ({estimate.group} intervals): {COUNT_METHOD}; "
        f"cycle {estimate.cycle_years:g} years; {estimate.n_patients} patients, "
        f"{estimate.n_transitions} observed transitions"
    )
    alpha = estimate.dirichlet_alpha()
    groups, notes = {}, []
    for row, from_id in enumerate(estimate.state_ids[:-1]):  # one group per state row
        keep = np.flatnonzero(alpha[row] > 0)
        if keep.size < 2:
            notes.append(
                f"row {from_id} ({estimate.group}): {int(estimate.row_totals[row])} observed "
                "transitions, reaching fewer than two states; no Dirichlet group written"
            )
            continue
        name = f"{prefix}from_{_name(from_id)}{suffix}"
        groups[name] = DirichletGroup(
            name=name,
            members=tuple(
                f"{prefix}p_{_name(from_id)}_{_name(estimate.state_ids[j])}{suffix}" for j in keep
            ),
            counts=tuple(float(c) for c in estimate.counts[row, keep]),
            prior=estimate.prior,
            source=source,
            note=f"probabilities per {estimate.cycle_years:g}-year cycle out of {from_id}",
        )
    return EstimatedParameters(groups=groups, notes=tuple(notes))


def _panel_entries(estimate: PanelEstimate, prefix: str) -> EstimatedParameters:
    source = (
        f"Estimated from {estimate.source}: {PANEL_METHOD}; {estimate.n_patients} patients, "
        f"{estimate.n_intervals} observed intervals ({estimate.n_exact_deaths} exact deaths, "
        f"{estimate.n_censored} censored)"
    )
    names = [f"{prefix}rate_{_name(a)}_{_name(b)}" for a, b in estimate.transitions]
    kinds = ["rate"] * len(names)
    if estimate.treatment_effect:
        names.append(f"{prefix}hr_treatment")
        kinds.append("hazard_ratio")
    low, high = estimate.confidence_intervals(0.95)
    se = estimate.standard_errors()
    parameters, notes = {}, []
    for index, name in enumerate(names):  # one entry per estimated parameter
        value = float(np.exp(estimate.log_parameters[index]))
        has_se = bool(np.isfinite(se[index]))
        if not has_se:
            notes.append(f"{name}: no standard error (no events seen or at a bound); fixed")
        parameters[name] = Parameter(
            name=name,
            value=value,
            source=source,
            kind=kinds[index],
            per_years=1.0 if kinds[index] == "rate" else None,
            low=float(low[index]) if has_se else None,
            high=float(high[index]) if has_se else None,
            distribution=(
                {
                    "type": "lognormal",
                    "meanlog": float(estimate.log_parameters[index]),
                    "sdlog": float(se[index]),
                }
                if has_se
                else None
            ),
            note=(
                "rate per year; low/high = Wald 95% interval"
                if kinds[index] == "rate"
                else "on stage-to-stage rates while treated; low/high = Wald 95% interval"
            ),
        )
    return EstimatedParameters(parameters=parameters, notes=tuple(notes))


def estimates_to_parameters(
    estimates: PanelEstimate | CountEstimate | Sequence[CountEstimate | PanelEstimate],
    *,
    prefix: str = "",
) -> EstimatedParameters:
    """Model-file entries for one or more estimates (see the module docstring).

    Parameters
    ----------
    estimates : PanelEstimate, CountEstimate or a sequence of them
    prefix : str
        Prepended to every parameter and group name (e.g. ``"cohort_"``).

    Returns
    -------
    EstimatedParameters

    Raises
    ------
    ModelError
        When ``prefix`` is not a valid start of a parameter name.
    """
    check_prefix(prefix)
    if isinstance(estimates, PanelEstimate | CountEstimate):
        estimates = [estimates]
    parameters: dict[str, Parameter] = {}
    groups: dict[str, DirichletGroup] = {}
    notes: list[str] = []
    for estimate in estimates:  # one per treatment group or method
        part = (
            _panel_entries(estimate, prefix)
            if isinstance(estimate, PanelEstimate)
            else _count_entries(estimate, prefix)
        )
        parameters |= part.parameters
        groups |= part.groups
        notes += part.notes
    return EstimatedParameters(parameters=parameters, groups=groups, notes=tuple(notes))


def merge_into_model(model: Model, estimated: EstimatedParameters) -> Model:
    """The model with the estimated entries added (same names replaced), validated.

    Raises
    ------
    ModelError
        When an estimated name clashes with a group member or parameter of the other kind,
        or the merged model fails validation.
    """
    from caredecide.modelfile import validate_model

    members = {m: g.name for g in model.groups.values() for m in g.members}
    new_members = {m for g in estimated.groups.values() for m in g.members}
    clashes = [
        Problem(
            where=f"parameters.{name}",
            message=f"estimated parameter {name!r} is a member of group {members[name]!r} in "
            "the model; expected a free name (use a prefix)",
        )
        for name in estimated.parameters
        if name in members and members[name] not in estimated.groups
    ] + [
        Problem(
            where=f"parameters.{name}",
            message=f"the model declares parameter {name!r} and the estimates make it a group "
            "member; expected a free name (use a prefix)",
        )
        for name in sorted(new_members & set(model.parameters))
    ]
    if clashes:
        raise ModelError(clashes, file=str(model.source_path) if model.source_path else None)
    merged = replace(
        model,
        parameters={**model.parameters, **estimated.parameters},
        groups={**model.groups, **estimated.groups},
    )
    validate_model(merged)
    return merged


def dumps_parameters(estimated: EstimatedParameters) -> str:
    """The entries as ``[parameters.*]`` / ``[groups.*]`` TOML tables, ready to paste
    into a model file (written by the model-file writer, so the syntax is the same)."""
    from caredecide.model import Settings
    from caredecide.modelfile import dumps_model

    bare = Model(
        title="estimates",
        settings=Settings(),
        states=(),
        actions=(),
        parameters=estimated.parameters,
        groups=estimated.groups,
    )
    text = dumps_model(bare)
    starts = [i for i in (text.find("\n[parameters."), text.find("\n[groups.")) if i >= 0]
    return FRAGMENT_HEADER + (text[min(starts) + 1 :] if starts else "")


def write_estimates(
    estimated: EstimatedParameters, out: Path | str, *, model: Path | str | None = None
) -> Path:
    """Write the entries: merged into ``model`` (saved at ``out``) or as TOML tables.

    Parameters
    ----------
    estimated : EstimatedParameters
    out : path
        Where to write. Without ``model``, an existing model file at ``out`` is updated;
        otherwise ``out`` receives the parameter tables only (a tables file written
        earlier is replaced).
    model : path, optional
        A model file to merge into; the result is saved at ``out``.
    """
    from caredecide.modelfile import loads_model, save_model
    from caredecide.outputs import staged_file

    out = Path(out)
    if model is not None:
        base = Path(model)
    elif out.exists() and not read_limited_text(
        out, MAX_MODEL_BYTES, what="a model file or a parameter tables file"
    ).startswith(FRAGMENT_HEADER):
        base = out
    else:
        base = None
    if base is None:
        with staged_file(out) as staging:
            staging.write_text(dumps_parameters(estimated), encoding="utf-8")
    else:
        # The file's own text is kept: comments (the synthetic-data header), key order
        # and layout survive; only the estimated entries change.
        text = read_limited_text(base, MAX_MODEL_BYTES, what="a model file (.toml)")
        base_model = loads_model(text, file=str(base), base_dir=base.parent)
        save_model(merge_into_model(base_model, estimated), out, original_text=text)
    return out
