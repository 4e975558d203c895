"""Starting points for a new model: small synthetic model files (every number invented).

Each template is complete and valid, so a user edits from something that solves. They are
marked synthetic in their text; research use only.
"""

from __future__ import annotations

_HEADER = (
    "# SYNTHETIC TEMPLATE - every number is invented; replace each one with a sourced\n"
    "# estimate. Research use only: not a substitute for clinical judgment, local\n"
    "# guidelines or licensed practice.\n"
)

TREAT_OR_WAIT = (
    _HEADER
    + """format = 2
title = "Template: treat now or wait (finite horizon)"

[settings]
cycle_years = 1.0
horizon_cycles = 20
start_age = 60.0
start = "early"
discount_outcomes = 0.03
discount_costs = 0.03
objective = "net_benefit"
willingness_to_pay = 20000.0
within_cycle = "trapezoid"
severity_order = ["early", "late"]

[[states]]
id = "early"
label = "Early disease"
qaly_weight = 0.85
cost = 500.0

[[states]]
id = "late"
label = "Late disease"
qaly_weight = 0.55
cost = 4000.0

[[states]]
id = "treated"
label = "On treatment"
qaly_weight = 0.8
cost = "c_treatment"

[[states]]
id = "dead"
label = "Dead"
absorbing = true

[[actions]]
id = "wait"
label = "Wait and monitor"
allowed_in = "all"

[[actions]]
id = "treat"
label = "Start treatment"
allowed_in = ["early", "late"]
oneoff_qaly_loss = 0.02

[transitions.wait.early]
late = "p_progress"
dead = 0.01
early = "rest"

[transitions.wait.late]
dead = 0.08
late = "rest"

[transitions.wait.treated]
dead = 0.015
treated = "rest"

[transitions.treat.early]
dead = 0.015
treated = "rest"

[transitions.treat.late]
dead = 0.05
treated = "rest"

[parameters.p_progress]
value = 0.15
kind = "probability"
low = 0.08
high = 0.25
distribution = { type = "beta", mean = 0.15, se = 0.04 }
source = "Invented for the template"

[parameters.c_treatment]
value = 3000.0
kind = "cost"
low = 2000.0
high = 4000.0
source = "Invented for the template"
"""
)

STATIONARY = (
    _HEADER
    + """format = 2
title = "Template: treat or wait, infinite horizon (for value iteration)"

[settings]
cycle_years = 1.0
horizon = "infinite"
start = "mild"
discount_outcomes = 0.05
discount_costs = 0.05
objective = "qalys"
within_cycle = "start"
severity_order = ["mild", "severe"]

[[states]]
id = "mild"
label = "Mild"
qaly_weight = 0.9

[[states]]
id = "severe"
label = "Severe"
qaly_weight = 0.5

[[states]]
id = "treated"
label = "On treatment"
qaly_weight = 0.8

[[states]]
id = "dead"
label = "Dead"
absorbing = true

[[actions]]
id = "wait"
label = "Wait"
allowed_in = "all"

[[actions]]
id = "treat"
label = "Treat"
allowed_in = ["mild", "severe"]
oneoff_qaly_loss = "q_harm"

[transitions.wait.mild]
severe = 0.2
dead = 0.02
mild = "rest"

[transitions.wait.severe]
dead = 0.15
severe = "rest"

[transitions.wait.treated]
dead = 0.04
treated = "rest"

[transitions.treat.mild]
dead = 0.04
treated = "rest"

[transitions.treat.severe]
dead = 0.06
treated = "rest"

[parameters.q_harm]
value = 0.3
kind = "other"
low = 0.1
high = 0.6
source = "Invented for the template"
"""
)

TEMPLATES: dict[str, str] = {
    "treat-or-wait": TREAT_OR_WAIT,
    "infinite-horizon": STATIONARY,
}
"""Template name -> model-file text."""
