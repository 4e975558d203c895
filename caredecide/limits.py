"""Limits and defaults in one place: file sizes, memory budgets, draw counts.

Every front end (CLI, report, app) and every library module takes its size limits and
memory budgets from here, so a model file accepted by one is accepted by all.
Sizes are in bytes.
"""

from __future__ import annotations

import os

MAX_MODEL_BYTES = 2_000_000
"""Largest model file accepted, from disk or uploaded (a hand-written model is a few KB)."""
MAX_LIFE_TABLE_BYTES = 1_000_000
"""Largest life-table CSV a model file may point to."""
MAX_STRATEGY_TABLE_BYTES = 1_000_000
"""Largest strategy table (CSV) accepted."""
MAX_RUN_RECORD_BYTES = 1_000_000
"""Largest run record (JSON) read back by ``caredecide rerun``."""
MAX_RECORDS_FILE_BYTES = 50_000_000
"""Largest cohort-records file read by the estimation step."""
MAX_DRAFT_BYTES = 1_000_000
"""Largest draft the app keeps for one model."""
MAX_EXPRESSION_LENGTH = 2000
"""Longest expression text, in characters."""
MAX_EXPRESSION_DEPTH = 50
"""Deepest nesting of an expression tree."""
MAX_NESTING = 32
"""Deepest nesting of brackets/braces, or of tables, accepted in a TOML or JSON file
(:mod:`caredecide.guarded`). A model file needs about 5 (a transition row is
``transitions.ACTION.STATE.TARGET``); 32 leaves room and stays far below Python's
recursion limit, which ``tomllib`` and ``json`` would otherwise reach."""
MAX_HASHED_BYTES = 4 * 1024**3
"""Largest file hashed for a run record (models, tables, outputs); a record may name any
path, so a device or an endless file must not be read without end."""
MAX_EXPANDED_STATES = 2000
"""Most states attributes and tunnels may generate (:mod:`caredecide.expand`): the
transition arrays grow as the square of the states (2,000 states and 3 actions take
96 MB per parameter set and cycle); the compile step's memory check applies on top."""
DISPLAY_CAP = 1000
"""Most cycles an infinite-horizon cohort trace shows (:mod:`caredecide.evaluate`); the
memory estimate counts it (:mod:`caredecide.memory`)."""
MAX_DRAWS = 100_000_000
"""Most probabilistic draws one run may ask for."""
MAX_APP_DRAWS = 20_000
"""Most probabilistic draws the app runs (the CLI has no such cap)."""

MODEL_ENV = "CAREDECIDE_MODEL"
"""Environment variable through which the app receives the model file to open."""

WTP_SEARCH_MAX_WHEN_ZERO = 100_000.0
"""Upper end (money per QALY) of willingness-to-pay searches and curves when the model's
willingness to pay is 0 (otherwise the upper end is twice the model's value)."""
SETTING_THRESHOLD_GRID = 21
"""Fewest grid values when searching a setting's threshold (willingness to pay, discount)."""
DISCOUNT_SEARCH_MAX = 0.10
"""Upper end of the discount-rate threshold search (annual rate)."""

MEMORY_FRACTION = 0.5
"""Share of the currently available physical memory a batch may use."""
FALLBACK_MEMORY_BYTES = 4 * 1024**3
"""Memory budget when the available memory cannot be read."""
CHUNK_MEMORY_BYTES = 1024**3
"""Working-memory budget of one chunk of a probabilistic run when none is given: 1 GiB, or
the memory budget if that is less. Larger chunks barely run faster (the solver is
vectorized over draws already) and would leave less room for the kept per-draw results."""
PSA_CHUNK_BYTES = 128 * 1024**2
"""Working memory of one chunk of a probabilistic run when the budget allows more: chunks
this size run fastest (1,000 draws of the demo). Larger chunks take fresh memory pages
for every array, whose first touch costs more than the per-chunk work saved; measured with
benchmarks/bench_uncertainty.py."""

SPARSE_MIN_STATES = 300
"""Below this many states dense transitions (and the compiled loops) are faster; "auto"
keeps them dense (:func:`caredecide.solvers.sparse.choose_form`, and the compiler's
choice of :class:`caredecide.compiled.SparseTransitions`)."""
SPARSE_MAX_DENSITY = 0.05
"""Largest share of non-zero transition entries for the sparse form."""
SPARSE_MAX_DRAWS = 16
"""Sparse rows go draw by draw: for many draws the dense batches win."""


def default_memory_limit() -> int:
    """Memory budget of a batch: half the currently available memory (4 GiB when unknown).

    Returns
    -------
    int
        Bytes.
    """
    try:
        available = os.sysconf("SC_AVPHYS_PAGES") * os.sysconf("SC_PAGE_SIZE")
    except (ValueError, OSError, AttributeError):
        return FALLBACK_MEMORY_BYTES
    return int(available * MEMORY_FRACTION)
