"""Batches of a large infinite-horizon model with few moves per state: chunks stay sparse.

The chunk driver sizes the chunks of such a model by the sparse form's memory estimate
and caps them at ``SPARSE_MAX_DRAWS`` draws, so that every chunk of a one-way batch is
solved with sparse rows; the answers do not depend on the chunk size (the driver's
contract) and equal the dense solve's (common practice: a storage change never changes the
answer beyond rounding).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from caredecide import chunks, memory
from caredecide.limits import SPARSE_MAX_DRAWS, SPARSE_MIN_STATES
from caredecide.modelfile import loads_model
from caredecide.objective import Objective
from caredecide.sensitivity import one_way
from tests.memory_models import grid_model_text


def _large(horizon=None, states=SPARSE_MIN_STATES + 20):
    """A progressive chain of ``states`` states (synthetic), ranges on both estimates."""
    text = grid_model_text(states, 2, horizon)
    text = text.replace(
        'value = 0.1\nkind = "probability"',
        'value = 0.1\nlow = 0.08\nhigh = 0.12\nkind = "probability"',
    )
    text = text.replace(
        'value = 0.02\nkind = "probability"',
        'value = 0.02\nlow = 0.015\nhigh = 0.025\nkind = "probability"',
    )
    return loads_model(text, file="large.toml")


def test_the_sparse_estimate_knows_which_shapes_are_solved_sparse():
    # The "auto" rule of solvers.sparse.choose_form on the model's structure: large, few
    # draws, an infinite horizon, few non-zeros per row.
    shape = memory.shape_of(_large())
    assert memory.stationary_sparse(shape)
    assert memory.stationary_sparse(shape.with_draws(SPARSE_MAX_DRAWS))
    assert not memory.stationary_sparse(shape.with_draws(SPARSE_MAX_DRAWS + 1))
    assert not memory.stationary_sparse(memory.shape_of(_large(horizon=20)))
    assert not memory.stationary_sparse(memory.shape_of(_large(states=SPARSE_MIN_STATES - 1)))
    # Counted sparse, a draw needs less than counted dense (no (S, S) systems); beyond
    # SPARSE_MAX_DRAWS every draw counts dense (draw_bytes: the bytes of a large chunk).
    one, two = (memory.pipeline_peak_bytes(shape.with_draws(k)) for k in (1, 2))
    assert memory.draw_bytes(shape) - (two - one) > 2 * 8 * shape.n_states**2


def test_a_large_sparse_batch_is_solved_sparse_in_chunks_of_at_most_the_sparse_limit(
    monkeypatch,
):
    model = _large()
    objective = Objective.from_settings(model.settings)
    n = SPARSE_MAX_DRAWS + 4
    frame = pd.DataFrame({"p_prog": np.linspace(0.08, 0.12, n), "p_die": np.full(n, 0.02)})
    assert chunks.chunk_size_for(model, n, evaluations=False) == SPARSE_MAX_DRAWS
    seen = []
    solve = chunks.solve
    monkeypatch.setattr(
        chunks, "solve", lambda c, o, **k: seen.append((c.n_draws, solve(c, o, **k))) or seen[-1][1]
    )
    compiled, result = chunks.solve_in_chunks(model, frame, objective)
    assert [(d, r.transition_form) for d, r in seen] == [
        (SPARSE_MAX_DRAWS, "sparse"),
        (4, "sparse"),
    ]
    # The same answers whatever the chunk size, and those of the dense solve.
    seen.clear()
    _, single = chunks.solve_in_chunks(model, frame, objective, chunk_size=1)
    decided = ~result.indifferent & ~single.indifferent
    np.testing.assert_array_equal(result.policy[decided], single.policy[decided])
    np.testing.assert_allclose(result.value, single.value, rtol=1e-12)
    dense = chunks.solve(compiled, objective, transition_form="dense")
    assert dense.transition_form == "dense"
    np.testing.assert_allclose(result.value, dense.value, rtol=1e-8)


def test_the_one_way_analysis_of_a_large_sparse_model_is_one_sparse_chunk(monkeypatch):
    # Two estimates: 1 + 2 x 2 parameter sets in one chunk (the dense rule would cut
    # them in several), solved sparse; the values at the model start match a one-draw
    # dense solve of each set (common practice, as above).
    from caredecide.compile import compile_model
    from caredecide.sensitivity.variation import one_at_a_time_sets, parameter_sets

    model = _large()
    seen = []
    solve = chunks.solve
    monkeypatch.setattr(
        chunks, "solve", lambda c, o, **k: seen.append((c.n_draws, solve(c, o, **k))) or seen[-1][1]
    )
    done = one_way(model, ["p_prog", "p_die"])
    assert [(d, r.transition_form) for d, r in seen] == [(5, "sparse")]
    objective = done.objective
    frame = one_at_a_time_sets(model, ["p_die"], np.array([[0.015, 0.025]]))
    compiled = compile_model(model, pd.concat([parameter_sets(model, {}), frame]))
    dense = solve(compiled, objective, transition_form="dense")
    values = dense.expected_value(compiled.start_distribution)
    row = done.table.set_index("parameter").loc["p_die"]
    assert row["value_base"] == pytest.approx(values[0], rel=1e-9)
    assert row["value_low"] == pytest.approx(values[1], rel=1e-9)
    assert row["value_high"] == pytest.approx(values[2], rel=1e-9)


def test_a_small_or_finite_model_keeps_the_dense_chunk_rule():
    # No sparse sizing where the solver would not keep sparse rows.
    small = loads_model(grid_model_text(40, 2, None), file="small.toml")
    finite = _large(horizon=20)
    for model in (small, finite):
        shape = memory.shape_of(model)
        assert chunks.sparse_chunk_size(model, shape, 50, chunks.memory_budget()) is None


def test_a_batch_can_keep_the_compiled_arrays_of_its_first_set_only():
    # keep_compiled=False (the one-way analysis): the first set's arrays, every set's
    # results, the same as keeping every set's arrays; joined results carry no chunk's
    # sparse rows (they fit one chunk only).
    model = _large()
    objective = Objective.from_settings(model.settings)
    frame = pd.DataFrame({"p_prog": np.linspace(0.08, 0.12, 5), "p_die": np.full(5, 0.02)})
    full, every = chunks.solve_in_chunks(model, frame, objective, chunk_size=2)
    first, lean = chunks.solve_in_chunks(model, frame, objective, chunk_size=2, keep_compiled=False)
    assert full.n_draws == 5 and first.n_draws == 1
    np.testing.assert_array_equal(first.transition, full.transition[:1])
    assert first.transition.base is None  # a copy: the chunk's arrays can be released
    np.testing.assert_array_equal(lean.policy, every.policy)
    np.testing.assert_array_equal(lean.value, every.value)
    assert every.transition_rows is None and lean.transition_rows is None
    alone = chunks.solve(full.take_draws(slice(0, 2)), objective)
    assert alone.transition_rows is not None  # one chunk's solve keeps them


def test_the_chunk_driver_holds_no_result_while_the_next_chunk_runs():
    # A caller that drops each chunk's result before asking for the next one holds one
    # chunk at a time (a large model's arrays are hundreds of MB a chunk): when a chunk
    # starts, the previous chunk's result is already gone (common practice: weak
    # references see the release).
    import weakref

    class Piece:
        pass

    alive = []
    made: list[weakref.ref] = []

    def job(start, stop):
        alive.append(any(ref() is not None for ref in made))
        piece = Piece()
        made.append(weakref.ref(piece))
        return piece

    for piece in chunks.run_chunks(job, chunks.chunk_ranges(4, 1)):
        del piece
    assert alive == [False, False, False, False]


@pytest.mark.parametrize(("given", "word"), [(2, "fewer"), (4, "more")])
def test_a_chunk_map_returning_another_number_of_results_is_refused(given, word):
    def wrong_map(job, ranges):
        return [job(0, 1)] * given

    with pytest.raises(ValueError, match=f"returned {word} results than 3 ranges"):
        list(chunks.run_chunks(lambda a, b: a, [(0, 1), (1, 2), (2, 3)], map_chunks=wrong_map))


def test_rows_given_by_rates_count_as_dense_in_the_estimate():
    # A row given by rates is a matrix exponential: it may reach every state of its
    # generator, so the estimate keeps the dense form (the side that over-counts memory).
    rates = loads_model(grid_model_text(SPARSE_MIN_STATES + 20, 2, None, rates=True), file="r.toml")
    shape = memory.shape_of(rates)
    assert shape.rate_rows > 0 and not memory.stationary_sparse(shape)
