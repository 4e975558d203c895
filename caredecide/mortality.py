"""Background mortality by age: a life table or the Gompertz-Makeham law.

Both sources are turned into a cumulative hazard ``H(x)`` (per year, from age 0), so the
probability of dying during a cycle of ``h`` years that starts at age ``x`` is

    q(x, h) = 1 - exp(-(H(x + h) - H(x)))

For Gompertz-Makeham, ``mu(x) = a + b c^x`` and ``H(x + h) - H(x) = a h + b c^x (c^h - 1) / ln c``
(Bowers et al. 1997, Actuarial Mathematics, section 3.7). A life table of annual death
probabilities ``q_x`` is read as a hazard ``-ln(1 - q_x)`` that is constant within each year
of age (common practice); ages past the last row keep the last row's hazard.
"""

from __future__ import annotations

import csv
import io
import math
from pathlib import Path

import numpy as np

from caredecide.errors import ModelError, Problem
from caredecide.guarded import read_limited_text
from caredecide.limits import MAX_LIFE_TABLE_BYTES


def gompertz_makeham_q(
    a: float, b: float, c: float, age: np.ndarray | float, years: float = 1.0
) -> np.ndarray:
    """Probability of dying within ``years`` from ``age`` under Gompertz-Makeham.

    Parameters
    ----------
    a, b, c : float
        Hazard ``mu(x) = a + b c^x`` per year (``a, b >= 0``, ``c > 1``).
    age : array_like
        Ages in years, any shape.
    years : float
        Length of the interval in years.

    Returns
    -------
    numpy.ndarray
        Death probabilities, same shape as ``age``.
    """
    age = np.asarray(age, dtype=float)
    log_c = math.log(c)
    cumulative = a * years + b * np.power(c, age) * np.expm1(years * log_c) / log_c
    return -np.expm1(-cumulative)


def read_life_table(path: Path | str) -> tuple[np.ndarray, np.ndarray]:
    """Read a life table CSV with columns ``age`` and ``annual_probability``.

    Returns
    -------
    ages, probabilities : numpy.ndarray
        (K,) ages in years (strictly increasing, one year apart) and annual death
        probabilities in [0, 1].

    Raises
    ------
    ModelError
        Naming the file, the row and the offending value.
    """
    path = Path(path)
    where = "mortality.table"
    if not path.exists():  # the model reader words this one itself
        raise FileNotFoundError(2, "life table not found", str(path))
    try:
        text = read_limited_text(path, MAX_LIFE_TABLE_BYTES, what="a life table (CSV)")
    except ModelError as error:
        raise ModelError(
            [Problem(p.where or where, p.message, p.file, p.line) for p in error.problems]
        ) from None
    reader = csv.DictReader(io.StringIO(text, newline=""))
    columns = reader.fieldnames or []
    if "age" not in columns or "annual_probability" not in columns:
        raise ModelError(
            Problem(
                where,
                f"columns are {columns}; expected 'age' and 'annual_probability'",
            ),
            file=str(path),
        )
    problems: list[Problem] = []
    ages: list[float] = []
    probabilities: list[float] = []
    for row_number, row in enumerate(reader, start=2):
        try:
            age, q = float(row["age"]), float(row["annual_probability"])
        except (TypeError, ValueError):
            problems.append(
                Problem(where, f"row {row_number}: {row!r} is not two numbers", line=row_number)
            )
            continue
        if not 0.0 <= q <= 1.0:
            problems.append(
                Problem(
                    where,
                    f"row {row_number} (age {age:g}): annual_probability {q!r} is outside [0, 1]",
                    line=row_number,
                )
            )
        ages.append(age)
        probabilities.append(q)
    if problems:
        raise ModelError(problems, file=str(path))
    return validate_life_table(np.array(ages), np.array(probabilities), file=str(path))


def validate_life_table(
    ages: np.ndarray, probabilities: np.ndarray, *, file: str | None = None
) -> tuple[np.ndarray, np.ndarray]:
    """Check that a life table has consecutive whole-year ages and probabilities in [0, 1]."""
    where = "mortality.table"
    if ages.size == 0:
        raise ModelError(Problem(where, "the life table has no rows"), file=file)
    steps = np.diff(ages)
    if np.any(steps != 1.0):
        bad = int(np.flatnonzero(steps != 1.0)[0])
        raise ModelError(
            Problem(
                where,
                f"ages must rise by exactly 1 year; got {ages[bad]:g} then {ages[bad + 1]:g}",
            ),
            file=file,
        )
    outside = (probabilities < 0) | (probabilities > 1) | ~np.isfinite(probabilities)
    if np.any(outside):
        bad = int(np.flatnonzero(outside)[0])
        raise ModelError(
            Problem(
                where,
                f"annual_probability {probabilities[bad]!r} at age {ages[bad]:g} is outside [0, 1]",
            ),
            file=file,
        )
    return ages.astype(float), probabilities.astype(float)


def life_table_q(
    ages: np.ndarray, probabilities: np.ndarray, age: np.ndarray | float, years: float = 1.0
) -> np.ndarray:
    """Probability of dying within ``years`` from ``age`` under a life table.

    Parameters
    ----------
    ages, probabilities : numpy.ndarray
        (K,) whole-year ages and annual death probabilities (see :func:`read_life_table`).
    age : array_like
        Ages in years, any shape, each >= ``ages[0]``.
    years : float
        Length of the interval in years.

    Returns
    -------
    numpy.ndarray
        Death probabilities, same shape as ``age``.
    """
    age = np.asarray(age, dtype=float)
    with np.errstate(divide="ignore"):
        hazard = -np.log1p(-probabilities)  # per year, constant within each year of age
    start = _cumulative_hazard(ages, hazard, age)
    end = _cumulative_hazard(ages, hazard, age + years)
    with np.errstate(invalid="ignore"):
        q = -np.expm1(-(end - start))
    # A row with q = 1 gives an infinite hazard: everyone alive then dies (inf - inf is nan).
    return np.where(np.isinf(end), 1.0, q)


def _cumulative_hazard(ages: np.ndarray, hazard: np.ndarray, x: np.ndarray) -> np.ndarray:
    """``H(x)`` from ``ages[0]``: full years of hazard below ``x`` plus the part-year."""
    # Hazard before the current year: cumulative sums with a leading zero.
    full = np.concatenate([[0.0], np.cumsum(hazard)])
    offset = x - ages[0]
    index = np.clip(np.floor(offset).astype(int), 0, hazard.size - 1)
    fraction = offset - index
    with np.errstate(invalid="ignore"):
        part = np.where(fraction > 0, fraction * hazard[index], 0.0)
    return full[index] + part


def background_probability(spec, ages: np.ndarray, cycle_years: float) -> np.ndarray:
    """Per-cycle background death probability at each age.

    Parameters
    ----------
    spec : caredecide.model.MortalitySpec
        The model's mortality section.
    ages : numpy.ndarray
        Ages (years) at the start of each cycle, any shape.
    cycle_years : float
        Cycle length in years.

    Returns
    -------
    numpy.ndarray
        Probability of dying from background causes during one cycle, shape of ``ages``.
    """
    if spec.gompertz_makeham is not None:
        a, b, c = spec.gompertz_makeham
        return gompertz_makeham_q(a, b, c, ages, cycle_years)
    return life_table_q(
        np.asarray(spec.table_ages, dtype=float),
        np.asarray(spec.table_probabilities, dtype=float),
        ages,
        cycle_years,
    )
