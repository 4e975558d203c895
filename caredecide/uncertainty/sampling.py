"""Reproducible parameter draws for probabilistic sensitivity analysis.

Each uncertain parameter (``[parameters.<name>]`` with a ``distribution`` other than
``fixed``) is drawn from its :class:`~caredecide.distributions.Distribution`; each
Dirichlet group (``[groups.<name>]``) from a Dirichlet over its counts plus prior
(Briggs, Ades & Price 2003, Med Decis Making 23(4):341-350). Parameters without a
distribution keep their base value (the compiler fills them in).

Reproducibility independent of chunking
---------------------------------------
Draws are made in fixed blocks of :data:`BLOCK_SIZE`. Block ``b`` uses its own
generator ``numpy.random.default_rng(SeedSequence(seed, spawn_key=(b,)))`` -- the
``b``-th child that ``SeedSequence(seed).spawn`` would give -- and always draws the
whole block in a fixed order (declared parameters, then groups). Draws ``start:stop``
are cut from the blocks that cover them, so any split of the work into chunks (serial,
threads, a cluster) yields the same numbers for the same seed.

Rank correlation (optional)
---------------------------
Named parameters may be given a target rank correlation by the method of Iman &
Conover 1982 (Commun Stat Simul Comput 11(3):311-334): within each block the
independent draws are re-ordered so that their ranks follow van der Waerden scores
whose correlation was adjusted (Cholesky factors) to the target. The target is the
correlation of those normal scores; the Spearman correlation of the draws comes out
close to ``(6 / pi) asin(r / 2)`` (0.68 for r = 0.7). Marginal
distributions are unchanged (the same values, re-ordered). Dirichlet members cannot be
correlated this way (their sum is fixed).
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass

import numpy as np
import pandas as pd

from caredecide.distributions import Distribution, dirichlet_from_counts, distribution_from_spec
from caredecide.errors import ModelError, Problem
from caredecide.limits import MAX_DRAWS
from caredecide.model import DirichletGroup
from caredecide.options import check_scalar

BLOCK_SIZE = 1000
"""Draws per block: one SeedSequence child per block (see the module docstring)."""

__all__ = [
    "BLOCK_SIZE",
    "MAX_DRAWS",
    "ParameterSampler",
    "block_seed",
    "sample_parameters",
]


def block_seed(seed: int, block: int) -> np.random.SeedSequence:
    """The seed sequence of block ``block``: equal to ``SeedSequence(seed).spawn(b + 1)[b]``."""
    return np.random.SeedSequence(seed, spawn_key=(block,))


def check_seed(seed: object) -> int:
    """``seed`` as an int, or a RunOptionError naming the value (a whole number >= 0)."""
    return check_scalar(seed, "seed", int, min_val=0)


def check_draw_count(n_draws: object, where: str = "draws") -> int:
    """``n_draws`` as an int in [1, MAX_DRAWS], or a RunOptionError naming the value."""
    return check_scalar(n_draws, where, int, min_val=1, max_val=MAX_DRAWS)


@dataclass(frozen=True)
class ParameterSampler:
    """Draws of a model's uncertain parameters, reproducible from one seed.

    Build with :meth:`from_model`. Attributes
    ----------
    names : tuple of str
        Columns of every draw table: uncertain declared parameters, then the members of
        each Dirichlet group (all members, so each row of a group sums to 1).
    distributions : tuple of (name, Distribution)
    groups : tuple of (group name, DirichletGroup)
    correlation : (C, C) float array or None
        Target rank correlation among ``correlated`` parameters.
    correlated : tuple of str
    file : str
        The model file, for messages.
    """

    names: tuple[str, ...]
    distributions: tuple[tuple[str, Distribution], ...]
    groups: tuple[tuple[str, DirichletGroup], ...]
    correlation: np.ndarray | None = None
    correlated: tuple[str, ...] = ()
    file: str = "<model>"

    @classmethod
    def from_model(
        cls,
        model,
        *,
        rank_correlation: Mapping[tuple[str, str], float] | None = None,
    ) -> ParameterSampler:
        """Sampler of every uncertain parameter of ``model``.

        Parameters
        ----------
        model : caredecide.model.Model
        rank_correlation : mapping (name, name) -> float, optional
            Target rank correlations in (-1, 1) between pairs of declared uncertain
            parameters, e.g. ``{("c_stage_2", "c_stage_3"): 0.6}``; other pairs are
            independent. The implied matrix must be positive definite.

        Raises
        ------
        ModelError
            Unknown, fixed or Dirichlet parameters in ``rank_correlation``, values outside
            (-1, 1), or a matrix that is not positive definite; bad distributions (naming
            ``parameters.<name>.distribution``).
        """
        from caredecide.modelfile.advisories import distribution_problems

        file = model.file_label
        distributions = []
        # A distribution that can draw outside its parameter's range (a normal on a
        # probability) is refused here too, before any draw, for models built in code.
        problems = distribution_problems(model)
        for name, parameter in model.parameters.items():
            if parameter.distribution is None:
                continue
            where = f"parameters.{name}.distribution"
            try:
                dist = distribution_from_spec(parameter.distribution, where=where)
            except ValueError as error:
                problems.append(Problem(where, str(error)))
                continue
            if dist.kind != "fixed":
                distributions.append((name, dist))
        groups = []
        for group_name, group in model.groups.items():
            where = f"groups.{group_name}"
            try:
                dirichlet = dirichlet_from_counts(
                    dict(zip(group.members, group.counts, strict=True)), group.prior, where=where
                )
            except ValueError as error:
                problems.append(Problem(where, str(error)))
                continue
            groups.append((group_name, dirichlet))
        if problems:
            raise ModelError(problems, file=file)
        names = tuple(n for n, _ in distributions) + tuple(m for _, g in groups for m in g.members)
        correlation, correlated = _correlation_matrix(
            rank_correlation, model, dict(distributions), file
        )
        return cls(
            names=names,
            distributions=tuple(distributions),
            groups=tuple(groups),
            correlation=correlation,
            correlated=correlated,
            file=file,
        )

    @property
    def group_members(self) -> dict[str, tuple[str, ...]]:
        """Members of each Dirichlet group, by group name."""
        return {name: tuple(group.members) for name, group in self.groups}

    @property
    def n_parameters(self) -> int:
        return len(self.names)

    def means(self) -> dict[str, float]:
        """Expected value of each sampled parameter (distribution or Dirichlet means)."""
        values = {name: float(dist.mean()) for name, dist in self.distributions}
        for _, group in self.groups:
            values.update(zip(group.members, map(float, group.mean()), strict=True))
        return values

    def block(self, seed: int, block: int) -> np.ndarray:
        """(BLOCK_SIZE, P) draws of block ``block``, columns in the order of :attr:`names`."""
        rng = np.random.default_rng(block_seed(seed, block))
        columns = [dist.sample(rng, BLOCK_SIZE) for _, dist in self.distributions]
        if self.correlation is not None:
            index = [self.names.index(n) for n in self.correlated]
            reordered = _iman_conover(
                np.column_stack([columns[i] for i in index]), self.correlation, rng
            )
            for j, i in enumerate(index):
                columns[i] = reordered[:, j]
        columns += [g.sample(rng, BLOCK_SIZE) for _, g in self.groups]  # (n, k) each
        if not columns:
            return np.empty((BLOCK_SIZE, 0))
        return np.column_stack(columns)

    def draw(self, seed: int, start: int, stop: int) -> np.ndarray:
        """(stop - start, P) draws ``start:stop`` of the run with this ``seed``.

        The same rows whatever ``start``/``stop`` split is used (see the module docstring).
        """
        seed = check_seed(seed)
        if not (
            isinstance(start, int | np.integer)
            and isinstance(stop, int | np.integer)
            and 0 <= start <= stop
        ):
            raise ModelError(
                Problem("draws", f"draw range {start!r}:{stop!r}; expected 0 <= start <= stop")
            )
        if start == stop:
            return np.empty((0, self.n_parameters))
        first, last = start // BLOCK_SIZE, (stop - 1) // BLOCK_SIZE
        # A loop over blocks (a handful per chunk), never over draws.
        table = np.concatenate([self.block(seed, b) for b in range(first, last + 1)])
        offset = first * BLOCK_SIZE
        return table[start - offset : stop - offset]

    def frame(self, seed: int, start: int, stop: int) -> pd.DataFrame:
        """Draws ``start:stop`` as a DataFrame (columns :attr:`names`, index = draw number)."""
        return pd.DataFrame(
            self.draw(seed, start, stop), columns=list(self.names), index=np.arange(start, stop)
        )


def sample_parameters(
    model,
    n_draws: int,
    seed: int,
    *,
    rank_correlation: Mapping[tuple[str, str], float] | None = None,
) -> pd.DataFrame:
    """``n_draws`` parameter sets of ``model`` as a DataFrame (one column per parameter).

    Parameters
    ----------
    model : caredecide.model.Model
    n_draws : int
        1 .. :data:`MAX_DRAWS`.
    seed : int
        >= 0; the same seed gives the same table.
    rank_correlation : mapping, optional
        See :meth:`ParameterSampler.from_model`.

    Returns
    -------
    pandas.DataFrame
        (n_draws, P): uncertain parameters and Dirichlet members, in the parameters'
        own units; ready for :func:`caredecide.compile.compile_model`.
    """
    n = check_draw_count(n_draws)
    sampler = ParameterSampler.from_model(model, rank_correlation=rank_correlation)
    return sampler.frame(seed, 0, n)


# ------------------------------------------------------------------------- correlation
def _correlation_matrix(
    rank_correlation: Mapping[tuple[str, str], float] | None,
    model,
    distributions: dict[str, Distribution],
    file: str,
) -> tuple[np.ndarray | None, tuple[str, ...]]:
    if not rank_correlation:
        return None, ()
    members = {m for g in model.groups.values() for m in g.members}
    problems = []
    pairs = []
    for key, value in rank_correlation.items():
        where = f"rank_correlation.{'.'.join(map(str, key)) if isinstance(key, tuple) else key}"
        if not (isinstance(key, tuple) and len(key) == 2 and key[0] != key[1]):
            problems.append(Problem(where, f"{key!r}: expected a pair of two different names"))
            continue
        for name in key:
            if name in members:
                problems.append(
                    Problem(
                        where,
                        f"{name!r} is a Dirichlet group member; its "
                        "rank cannot be correlated (the group sums to 1)",
                    )
                )
            elif name not in model.parameters:
                problems.append(
                    Problem(
                        where,
                        f"unknown parameter {name!r}; expected one of {sorted(distributions)}",
                    )
                )
            elif name not in distributions:
                problems.append(
                    Problem(
                        where,
                        f"parameter {name!r} has no distribution (it is "
                        "fixed); only uncertain parameters can be correlated",
                    )
                )
        number = value if isinstance(value, int | float) and not isinstance(value, bool) else None
        if number is None or not -1.0 < float(number) < 1.0:
            problems.append(Problem(where, f"correlation {value!r}; expected a number in (-1, 1)"))
        pairs.append((key, value))
    if problems:
        raise ModelError(problems, file=file)
    correlated = tuple(n for n in distributions if any(n in k for k, _ in pairs))
    index = {n: i for i, n in enumerate(correlated)}
    matrix = np.eye(len(correlated))
    for (a, b), value in pairs:
        matrix[index[a], index[b]] = matrix[index[b], index[a]] = float(value)
    if np.linalg.eigvalsh(matrix).min() <= 1e-10:
        raise ModelError(
            Problem(
                "rank_correlation",
                f"the correlations among {list(correlated)} do not form "
                f"a positive definite matrix (eigenvalues "
                f"{np.round(np.linalg.eigvalsh(matrix), 4).tolist()}); lower some of them",
            ),
            file=file,
        )
    return matrix, correlated


def _iman_conover(values: np.ndarray, target: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    """Re-order each column of ``values`` (n, C) so their ranks correlate as ``target``.

    Iman & Conover 1982: scores ``Phi^-1(i / (n + 1))`` are permuted per column, their
    sample correlation ``E = F F'`` is replaced by ``target = L L'`` through
    ``scores F'^-1 L'``, and each column of ``values`` takes the rank order of the
    adjusted scores.
    """
    import scipy.special
    import scipy.stats

    n, c = values.shape
    scores = scipy.special.ndtri(np.arange(1, n + 1) / (n + 1))
    permuted = np.column_stack([rng.permutation(scores) for _ in range(c)])  # loop over columns
    actual = np.linalg.cholesky(np.corrcoef(permuted, rowvar=False))
    # Whiten the scores' own correlation (actual^-T), then impose the target's factor.
    adjusted = permuted @ np.linalg.solve(actual.T, np.linalg.cholesky(target).T)
    ranks = scipy.stats.rankdata(adjusted, axis=0, method="ordinal").astype(int) - 1
    ordered = np.sort(values, axis=0)
    return np.take_along_axis(ordered, ranks, axis=0)
