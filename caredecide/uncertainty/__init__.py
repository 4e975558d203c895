"""Probabilistic analysis outputs: value of information and acceptability.

RESEARCH USE ONLY: not a substitute for clinical judgment, local guidelines or
licensed practice.

Modules
-------
voi
    EVPI with its Monte Carlo error; EVPPI by regression (Strong et al. 2014).
acceptability
    Acceptability curves and frontier, shares of actions across draws, running means.
"""
