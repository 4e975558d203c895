"""A published two-arm cohort model written in 4 health states with no workaround.

Source: the HIV/AIDS model of Chancellor et al. 1997 (PharmacoEconomics 12(1):54-66) as worked
in Briggs, Claxton & Sculpher 2006, Decision Modelling for Health Economic Evaluation, ch. 2
(the inputs and results below are from memory). Zidovudine monotherapy against combination
therapy (zidovudine plus lamivudine for the first 2 years), 4 states (A: CD4 200-500,
B: CD4 < 200, C: AIDS, D: death), 1-year cycles, 20 years, costs discounted at 6%, life-years
not discounted, the relative risk 0.509 applied to the transition probabilities (not the
rates) during the first two cycles.

What the model file needs, each a feature of the format:
- an arm cost for the first two years only: ``[under_action.combination.<state>] cost =
  "when(cycle < 2, c_lamivudine, 0)"``, counted by occupancy like a state cost;
- a relative risk on probabilities for two cycles: ``times_rr(p, when(cycle < 2, rr, 1))``;
- ``cycle`` meaning the same cycle in the cost and in the transition.

Exact inputs (from memory): transition counts from A 1251/350/116/17 (to A/B/C/D), from B
731/512/15 (to B/C/D), from C 1312/437 (to C/D); annual costs (direct medical + community)
A 1701 + 1055, B 1774 + 1278, C 6948 + 2059; zidovudine 2278 and lamivudine 2086.50 a year.
Published results (end-of-cycle convention, from memory): monotherapy costs 44,663,
combination 50,602, ICER 6,276 per life-year gained.
"""

from __future__ import annotations

import numpy as np
import pytest

from caredecide.compile import compile_model
from caredecide.evaluate import evaluate_policy
from caredecide.objective import Objective
from tests.conftest import load_dict

COUNTS = {
    "A": {"A": 1251, "B": 350, "C": 116, "D": 17},
    "B": {"B": 731, "C": 512, "D": 15},
    "C": {"C": 1312, "D": 437},
}
COSTS = {"A": 1701 + 1055, "B": 1774 + 1278, "C": 6948 + 2059}
ZIDOVUDINE, LAMIVUDINE, RR = 2278.0, 2086.5, 0.509


def _model_dict(within_cycle: str) -> dict:
    parameters = {
        "rr_combination": {"value": RR, "kind": "relative_risk", "source": "Chancellor 1997"},
        "c_zidovudine": {"value": ZIDOVUDINE, "kind": "cost", "source": "Chancellor 1997"},
        "c_lamivudine": {"value": LAMIVUDINE, "kind": "cost", "source": "Chancellor 1997"},
    }
    for origin, row in COUNTS.items():
        total = sum(row.values())
        for to, count in row.items():
            if to != origin:
                parameters[f"p_{origin}{to}"] = {
                    "value": count / total,
                    "kind": "probability",
                    "per_years": 1.0,
                    "source": "Chancellor 1997: transition counts",
                }
        parameters[f"c_{origin}"] = {
            "value": float(COSTS[origin]),
            "kind": "cost",
            "source": "Chancellor 1997: direct and community care",
        }

    def rows(effect: str | None) -> dict:
        out = {}
        for origin, row in COUNTS.items():
            cells = {}
            for to in row:
                if to == origin:
                    cells[to] = "rest"
                elif effect is None:
                    cells[to] = f"p_{origin}{to}"
                else:  # the relative risk on the probability, in the first two cycles only
                    cells[to] = f"times_rr(p_{origin}{to}, when(cycle < 2, {effect}, 1))"
            out[origin] = cells
        return out

    return {
        "format": 2,
        "title": "Two-arm published cohort model (4 states)",
        "settings": {
            "cycle_years": 1.0,
            "horizon_cycles": 20,
            "start": "A",
            "discount_outcomes": 0.0,
            "discount_costs": 0.06,
            "objective": "qalys",
            "within_cycle": within_cycle,
        },
        "states": [
            *(
                {"id": s, "qaly_weight": 1.0, "cost": f"c_{s} + c_zidovudine"}
                for s in ("A", "B", "C")
            ),
            {"id": "D", "absorbing": True},
        ],
        "actions": [{"id": "monotherapy"}, {"id": "combination"}],
        "transitions": {"monotherapy": rows(None), "combination": rows("rr_combination")},
        "under_action": {
            "combination": {
                s: {"cost": "when(cycle < 2, c_lamivudine, 0)"} for s in ("A", "B", "C")
            }
        },
        "parameters": parameters,
    }


def _arms(within_cycle: str):
    compiled = compile_model(load_dict(_model_dict(within_cycle)))
    objective = Objective("qalys")
    mono, combo = (evaluate_policy(compiled, a, objective) for a in (0, 1))
    return mono, combo


def _hand_totals(within_cycle: str) -> dict[str, tuple[float, float]]:
    """An independent loop over the trace, written the spreadsheet way (arm -> (LYs, costs))."""
    P = np.zeros((4, 4))
    for i, origin in enumerate("ABC"):
        total = sum(COUNTS[origin].values())
        for to, count in COUNTS[origin].items():
            P[i, "ABCD".index(to)] = count / total
    P[3, 3] = 1.0
    P_combo = P * RR
    np.fill_diagonal(P_combo, 0.0)
    np.fill_diagonal(P_combo, 1.0 - P_combo.sum(axis=1))
    alive = np.array([1.0, 1.0, 1.0, 0.0])
    cost = np.array([COSTS["A"], COSTS["B"], COSTS["C"], 0.0]) + ZIDOVUDINE * alive
    out = {}
    for arm in ("mono", "combo"):
        m, ly, c = np.array([1.0, 0, 0, 0]), 0.0, 0.0
        for t in range(20):  # cycle t runs from year t to t + 1; discount at its end
            nxt = m @ (P_combo if arm == "combo" and t < 2 else P)
            occupancy = nxt if within_cycle == "end" else (m + nxt) / 2
            extra = LAMIVUDINE * alive if arm == "combo" and t < 2 else 0.0
            ly += occupancy @ alive
            c += occupancy @ (cost + extra) / 1.06 ** (t + 1)
            m = nxt
        out[arm] = (ly, c)
    return out


def test_end_of_cycle_reproduces_the_published_icer():
    # Source: Chancellor et al. 1997 as worked in Briggs, Claxton & Sculpher 2006, ch. 2
    # (from memory): costs 44,663 and 50,602; ICER 6,276 per life-year gained.
    mono, combo = _arms("end")
    assert mono.costs[0] == pytest.approx(44_663, rel=1e-4)
    assert combo.costs[0] == pytest.approx(50_602, rel=1e-4)
    icer = (combo.costs[0] - mono.costs[0]) / (combo.life_years[0] - mono.life_years[0])
    assert icer == pytest.approx(6_276, rel=1e-3)  # within 0.1%
    # The same figures by the independent loop (end-of-cycle trace, 1/1.06^t with t = 1..20).
    hand = _hand_totals("end")
    assert mono.life_years[0] == pytest.approx(hand["mono"][0], rel=1e-12)
    assert combo.costs[0] == pytest.approx(hand["combo"][1], rel=1e-12)


def test_textbook_half_cycle_convention_matches_the_hand_loop():
    # The textbook half-cycle correction (Sonnenberg & Beck 1993; Siebert et al. 2012):
    # cycle-average occupancy (m_t + m_{t+1}) / 2, discounted once at the cycle end. No
    # published ICER under this convention is known to us for this model; the check is the
    # independent loop on the published inputs (ICER about 6,242 per life-year gained).
    mono, combo = _arms("half_cycle")
    hand = _hand_totals("half_cycle")
    for outcome, arm in ((mono, "mono"), (combo, "combo")):
        assert outcome.life_years[0] == pytest.approx(hand[arm][0], rel=1e-12)
        assert outcome.costs[0] == pytest.approx(hand[arm][1], rel=1e-12)
    icer = (combo.costs[0] - mono.costs[0]) / (combo.life_years[0] - mono.life_years[0])
    hand_icer = (hand["combo"][1] - hand["mono"][1]) / (hand["combo"][0] - hand["mono"][0])
    assert icer == pytest.approx(hand_icer, rel=1e-10)
    assert icer == pytest.approx(6_241.9, abs=0.1)


def test_the_arm_cost_is_paid_in_the_first_two_cycles_only():
    # cycle < 2 in the cost means cycles 0 and 1, as in the transitions: with the end-of-cycle
    # count the lamivudine cost falls on those alive at boundaries 1 and 2, i.e. the cost
    # difference of the arms' flows in cycle 2 onwards comes from the trace only.
    compiled = compile_model(load_dict(_model_dict("end")))
    assert compiled.state_action_cost.shape[1] == 20
    np.testing.assert_allclose(compiled.state_action_cost[0, :2, :3, 1], LAMIVUDINE)
    np.testing.assert_allclose(compiled.state_action_cost[0, 2:, :, :], 0.0)
    np.testing.assert_allclose(compiled.state_action_cost[0, :, 3, 1], 0.0)  # not in death
