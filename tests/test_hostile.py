"""Hostile model files (issue 14 item 2): a fuzzer of random and mutated model files and a
list of known-bad inputs. Each must end in a clear message naming the file (exit status
2), with no traceback and nothing written, or be a valid model (exit status 0).

No reference values: the properties are the refusal rules themselves.
"""

from __future__ import annotations

import tempfile
from pathlib import Path

import pytest
import tomli_w
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from typer.testing import CliRunner

from caredecide.cli import app
from tests.conftest import small_model_dict

runner = CliRunner()
BASE = tomli_w.dumps(small_model_dict())
TOKENS = [
    "[", "]", "{", "}", '"', "'", "=", ",", ".", "#", "\n", "\x00", "nan", "inf", "-inf",
    "1e309", "9" * 400, "-1", "0", "true", "[[states]]", "[settings]", "☃", "\u202e",
    "(((((", "rest", "__import__", "**", "1/0", '"""', "\\u0000", "states = 5",
]  # fmt: skip


def _outcome(tmp: Path, text: bytes) -> tuple[int, str, bool]:
    model = tmp / "fuzzed.toml"
    model.write_bytes(text)
    out = tmp / "out"
    run = runner.invoke(app, ["solve", str(model), "--out", str(out), "--quiet"])
    if run.exception is not None and not isinstance(run.exception, SystemExit):
        raise run.exception  # a traceback: the test fails with it
    written = out.exists() and any(out.iterdir())
    leftovers = list(tmp.glob(".caredecide-staging-*"))
    assert not leftovers
    return run.exit_code, run.stderr, written


def _check(text: bytes) -> None:
    with tempfile.TemporaryDirectory() as folder:
        code, stderr, written = _outcome(Path(folder), text)
    assert code in (0, 2), stderr
    if code == 2:
        assert "Traceback" not in stderr
        assert "fuzzed.toml" in stderr and "error:" in stderr  # the message names a place
        assert not written


@st.composite
def mutated_models(draw) -> bytes:
    text = BASE
    for _ in range(draw(st.integers(1, 4))):
        kind = draw(st.sampled_from(["delete", "insert", "duplicate", "replace"]))
        position = draw(st.integers(0, len(text)))
        if kind == "delete":
            text = text[:position] + text[position + draw(st.integers(1, 40)) :]
        elif kind == "insert":
            text = text[:position] + draw(st.sampled_from(TOKENS)) + text[position:]
        elif kind == "duplicate":
            lines = text.splitlines(keepends=True)
            i = draw(st.integers(0, len(lines) - 1))
            text = "".join([*lines[: i + 1], lines[i], *lines[i + 1 :]])
        else:
            value = draw(
                st.one_of(
                    st.integers(-(10**30), 10**30).map(str),
                    st.floats(allow_nan=True, allow_infinity=True).map(repr),
                    st.sampled_from(['"x"', "[]", "{}", "true", '"nan"', '"inf"', '"-1"']),
                )
            )
            text = text.replace("= ", f"= {value} #", 1) if position % 2 else text
            text = text.replace(" = 10\n", f" = {value}\n", 1)
    return text.encode("utf-8", "surrogatepass")


@settings(
    max_examples=40,
    deadline=None,
    derandomize=True,
    suppress_health_check=[HealthCheck.too_slow, HealthCheck.function_scoped_fixture],
)
@given(mutated_models())
def test_mutated_model_files_fail_cleanly(text: bytes) -> None:
    _check(text)


@settings(max_examples=25, deadline=None, derandomize=True)
@given(st.binary(max_size=300) | st.text(max_size=300).map(lambda t: t.encode("utf-8")))
def test_random_bytes_fail_cleanly(text: bytes) -> None:
    _check(text)


def _sub(old: str, new: str) -> str:
    assert old in BASE, old
    return BASE.replace(old, new, 1)


DEEP = "(" * 3000 + "u_sick" + ")" * 3000
HOSTILE = {
    "empty": "",
    "binary": "\x00\x01\x02",
    "huge_integer": _sub("horizon_cycles = 10", "horizon_cycles = " + "9" * 5000),
    "nan_cost": _sub("cost = 100.0", "cost = nan"),
    "inf_string": _sub('qaly_weight = "u_sick"', 'qaly_weight = "inf"'),
    "duplicate_key": _sub("cycle_years = 1.0", "cycle_years = 1.0\ncycle_years = 2.0"),
    "text_horizon": _sub("horizon_cycles = 10", 'horizon_cycles = "ten"'),
    "negative_horizon": _sub("horizon_cycles = 10", "horizon_cycles = -5"),
    "absurd_horizon": _sub("horizon_cycles = 10", "horizon_cycles = 1000000000000"),
    "negative_discount": _sub("discount_costs = 0.03", "discount_costs = -0.99"),
    "deep_expression": _sub('qaly_weight = "u_sick"', f'qaly_weight = "{DEEP}"'),
    "code_in_expression": _sub('qaly_weight = "u_sick"', "qaly_weight = \"__import__('os')\""),
    "power_tower": _sub('qaly_weight = "u_sick"', 'qaly_weight = "10**10**10"'),
    "deep_array": "a = " + "[" * 5000 + "]" * 5000,
    "deep_table": "a = " + "{ b = " * 5000 + "1" + " }" * 5000,
    "deep_dotted": "[" + ".".join(["k"] * 5000) + "]\n",
}  # fmt: skip


@pytest.mark.parametrize("name", sorted(HOSTILE))
def test_known_hostile_files_are_refused(name: str) -> None:
    with tempfile.TemporaryDirectory() as folder:
        code, stderr, written = _outcome(Path(folder), HOSTILE[name].encode("utf-8"))
    assert code == 2, stderr
    assert "fuzzed.toml" in stderr and "Traceback" not in stderr and not written
