"""One expansion and one parse per model object, never a stale one.

caredecide.per_object keeps the expansion (caredecide.expand.expand) and the parsed
expressions (caredecide.compile.parse_model_expressions) of each live model object.
Keeping a result per object while the object lives, keyed by identity and dropped by a
finalizer, is common practice (the standard library's weakref documentation describes
finalizers for this); these tests check that the kept result is the one a fresh parse
gives, that a changed copy never meets its original's result, that nothing is kept
alive, and that one analysis expands and parses a model once.
"""

from __future__ import annotations

import functools
import gc
import threading
import weakref
from dataclasses import replace
from pathlib import Path

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from caredecide import compile as compile_module
from caredecide import expand as expand_module
from caredecide import memory
from caredecide.compile import ParsedModel, compile_model, parse_model_expressions
from caredecide.expand import expand, expand_model
from caredecide.model import Model
from caredecide.modelfile import load_model, validate_model
from caredecide.modelfile.overrides import with_overrides
from caredecide.per_object import PerObjectCache
from caredecide.scenarios import scenario_models
from caredecide.sensitivity import cell_sensitivity, one_way

MODELS = Path(__file__).resolve().parent.parent / "synthetic_cohort" / "models"
PROGRESSIVE = MODELS / "demo_progressive.toml"
TUNNELS = MODELS / "demo_years_since_progression.toml"


@functools.cache
def progressive() -> Model:
    """The demo model, read once for the property test (its examples make copies)."""
    return load_model(PROGRESSIVE)


def fresh_parse(model: Model) -> ParsedModel:
    """The parse of ``model`` made now, past every cache (its flat model expanded afresh)."""
    if expand_module.uses_expansion(model):
        flat = expand_module._Expander(model).run().model
    else:
        flat = model
    return compile_module._parse_flat(flat)


def contents(parsed: ParsedModel) -> tuple:
    """Everything a parse holds, compiled programs included (``Expression.__eq__``
    compares source texts only, which would miss a changed ``[derived]`` definition)."""
    entries = tuple(
        (e.where, e.action, e.state, e.target, e.expression.source, e.expression._program)
        for e in parsed.all_entries()
    )
    return entries, tuple(parsed.problems), frozenset(parsed.derived_used)


def with_cell(model: Model, action: str, source: str, target: str, text: str) -> Model:
    """A copy of ``model`` whose transition cell (action, source, target) reads ``text``."""
    table = {a: {s: dict(row) for s, row in rows.items()} for a, rows in model.transitions.items()}
    table[action][source][target] = text
    return replace(model, transitions=table)


def first_cell(model: Model) -> tuple[str, str, str, str]:
    """(action, source, target, text) of the first non-remainder transition cell."""
    for action, rows in model.transitions.items():
        for source, row in rows.items():
            for target, text in row.items():
                if str(text).strip() != "rest":
                    return action, source, target, str(text)
    raise AssertionError("the model has no transition cell")


def cell_text(parsed: ParsedModel, where: str) -> str:
    return next(e.expression.source for e in parsed.transitions if e.where == where)


@pytest.mark.parametrize("path", [PROGRESSIVE, TUNNELS], ids=lambda p: p.stem)
def test_the_kept_parse_equals_a_fresh_parse(path: Path) -> None:
    model = load_model(path)
    kept = parse_model_expressions(model)
    assert contents(kept) == contents(fresh_parse(model))
    assert kept.all_entries(), "the demo has expressions"
    assert parse_model_expressions(model) is kept  # the same object, not parsed again
    assert expand(model) is expand(model) or not expand_module.uses_expansion(model)


@pytest.mark.parametrize("path", [PROGRESSIVE, TUNNELS], ids=lambda p: p.stem)
def test_a_changed_copy_gets_its_own_parse(path: Path) -> None:
    # A cache keyed on anything but the object (title, file, states) would serve the
    # original's parse to the copy: the copy has the same title, file and states.
    model = load_model(path)
    action, source, target, text = first_cell(model)
    where = f"transitions.{action}.{source}.{target}"
    original = parse_model_expressions(model)
    changed = with_cell(model, action, source, target, f"({text}) * 0.5")
    assert changed.title == model.title and changed.source_path == model.source_path
    parsed = parse_model_expressions(changed)
    assert parsed is not original
    assert contents(parsed) == contents(fresh_parse(changed))
    if not expand_module.uses_expansion(model):
        assert cell_text(parsed, where) == f"({text}) * 0.5"
        assert cell_text(original, where) == text
    assert parsed != original
    # Asking for the original again still gives the original's parse (no single slot).
    assert parse_model_expressions(model) is original
    assert contents(original) == contents(fresh_parse(model))


def test_set_overrides_and_scenarios_are_parsed_for_themselves() -> None:
    model = load_model(PROGRESSIVE)
    base = parse_model_expressions(model)
    action, source, target, _ = first_cell(model)
    changed = with_overrides(model, {f"transitions.{action}.{source}.{target}": "0.125"})
    parsed = parse_model_expressions(changed)
    assert cell_text(parsed, f"transitions.{action}.{source}.{target}") == "0.125"
    assert contents(parsed) == contents(fresh_parse(changed)) and parsed != base
    for _, scenario_model in scenario_models(model, {"settings.willingness_to_pay": 20000.0}):
        assert contents(parse_model_expressions(scenario_model)) == contents(
            fresh_parse(scenario_model)
        )
    assert parse_model_expressions(model) is base


def test_a_changed_derived_definition_is_parsed_again() -> None:
    # The cells' texts stay the same; only the definition they read changes.
    model = load_model(TUNNELS)
    name, text = next(iter(model.derived.items()))
    original = contents(parse_model_expressions(model))
    changed = replace(model, derived={**model.derived, name: f"({text}) * 2"})
    assert contents(parse_model_expressions(changed)) == contents(fresh_parse(changed))
    assert contents(parse_model_expressions(changed)) != original
    assert contents(parse_model_expressions(model)) == original


@pytest.mark.parametrize("path", [PROGRESSIVE, TUNNELS], ids=lambda p: p.stem)
def test_the_caches_keep_no_model_alive(path: Path) -> None:
    model = load_model(path)
    flat = expand_model(model)
    parse_model_expressions(model)
    parse_model_expressions(flat)
    gone = weakref.ref(model)
    flat_gone = weakref.ref(flat)
    gc.collect()  # models of earlier tests left in reference cycles go first
    before = len(compile_module._PARSED)
    del model, flat
    gc.collect()
    assert gone() is None and flat_gone() is None
    assert len(compile_module._PARSED) == before - 1  # its entry went with it
    assert len(expand_module._EXPANSIONS) <= 8


class Owner:
    """A small object that can be referred to weakly (ids of freed ones are reused)."""

    def __init__(self, value: int) -> None:
        self.value = value


def test_an_id_reused_by_a_new_object_never_meets_the_old_value() -> None:
    cache: PerObjectCache[int] = PerObjectCache(size=4)
    old = Owner(1)
    old_id = id(old)
    assert cache.get(old, lambda: 1) == 1
    del old
    kept = []
    for _ in range(200):  # CPython hands the freed block to a later object of that size
        new = Owner(2)
        if id(new) == old_id:
            break
        kept.append(new)
    else:
        pytest.skip("this interpreter did not reuse the id")
    assert cache.get(new, lambda: new.value) == 2


def test_the_cache_is_bounded_and_drops_the_least_recently_used() -> None:
    cache: PerObjectCache[int] = PerObjectCache(size=2)
    made: list[int] = []

    def make(owner: Owner) -> int:
        made.append(owner.value)
        return owner.value * 10

    a, b, c = Owner(1), Owner(2), Owner(3)
    assert [cache.get(o, lambda o=o: make(o)) for o in (a, b, a, c)] == [10, 20, 10, 30]
    assert made == [1, 2, 3] and len(cache) == 2
    assert cache.get(b, lambda: make(b)) == 20  # b was the least recently used: made again
    assert made == [1, 2, 3, 2]
    assert cache.get(c, lambda: make(c)) == 30 and made == [1, 2, 3, 2]


def test_threads_share_one_value_per_owner() -> None:
    cache: PerObjectCache[list[int]] = PerObjectCache(size=4)
    owner = Owner(7)
    seen: list[list[int]] = []

    def ask() -> None:
        for _ in range(200):
            seen.append(cache.get(owner, lambda: [owner.value]))

    threads = [threading.Thread(target=ask) for _ in range(4)]
    for thread in threads:
        thread.start()
    for thread in threads:
        thread.join()
    assert len(seen) == 800 and all(v == [7] for v in seen)
    assert len({id(v) for v in seen[-10:]}) == 1 and len(cache) == 1


@settings(max_examples=25)
@given(st.lists(st.integers(min_value=1, max_value=99), min_size=1, max_size=6))
def test_property_every_copy_reads_its_own_cell(values: list[int]) -> None:
    # Copies made and parsed in any order (some equal in content) each get their own
    # cell text back, before and after the others were parsed.
    model = progressive()
    action, source, target, _ = first_cell(model)
    where = f"transitions.{action}.{source}.{target}"
    copies = [with_cell(model, action, source, target, f"0.{v:02d}") for v in values]
    first = [parse_model_expressions(m) for m in copies]
    again = [parse_model_expressions(m) for m in reversed(copies)][::-1]
    for v, p, q in zip(values, first, again, strict=True):
        assert p is q and cell_text(p, where) == f"0.{v:02d}"


@pytest.mark.parametrize("path", [PROGRESSIVE, TUNNELS], ids=lambda p: p.stem)
def test_one_analysis_expands_and_parses_a_model_once(
    path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    parses: list[int] = []
    expansions: list[int] = []
    parse_flat = compile_module._parse_flat
    run = expand_module._Expander.run
    monkeypatch.setattr(compile_module, "_parse_flat", lambda m: parses.append(1) or parse_flat(m))
    monkeypatch.setattr(expand_module._Expander, "run", lambda s: expansions.append(1) or run(s))
    model = load_model(path)  # validated while read: the first expansion and parse
    parses.clear()
    expansions.clear()
    names = list(model.parameters)[:3]
    one_way(model, names)
    validate_model(model)
    assert parses == [] and expansions == []  # served from the read
    # Nothing on the way changed the kept parse.
    assert contents(parse_model_expressions(model)) == contents(fresh_parse(model))
    parses.clear()
    expansions.clear()
    copy = replace(model, title=model.title + " (copy)")
    one_way(copy, names)
    assert parses == [1]
    assert expansions == ([1] if expand_module.uses_expansion(model) else [])


@pytest.mark.parametrize("path", [PROGRESSIVE, TUNNELS], ids=lambda p: p.stem)
def test_the_readers_of_the_kept_parse_leave_it_as_it_was(path: Path) -> None:
    # Every reader of the shared parse runs on one model object; a reader that changed
    # it (appended an entry, re-indexed one) would leave it unlike a fresh parse.
    model = load_model(path)
    kept = parse_model_expressions(model)
    before = contents(kept)
    memory.shape_of(model, 3)
    compile_model(model, transition_form="sparse")
    compile_model(model, transition_form="dense")
    cell_sensitivity(model, grid=3)
    one_way(model)
    validate_model(model)
    assert parse_model_expressions(model) is kept
    assert contents(kept) == before == contents(fresh_parse(model))
