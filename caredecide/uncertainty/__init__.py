"""Probabilistic analysis outputs: value of information and acceptability.

RESEARCH USE ONLY: not a substitute for clinical judgment, local guidelines or
licensed practice.

Modules (import them directly; this package imports nothing on its own so that other
modules can join it without import cycles):

voi
    ``evpi`` (a float with its Monte Carlo error), ``evppi_regression`` (Strong, Oakley
    & Brennan 2014 regression EVPPI with penalised splines), ``opportunity_loss``.
acceptability
    ``acceptability_curve``, ``acceptability_frontier``, ``evpi_curve``,
    ``action_shares`` (shares of actions across draws) and ``running_mean``.

The rules and formulas are in ``docs/methods-economics.md``.
"""
