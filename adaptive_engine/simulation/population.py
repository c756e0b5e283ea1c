"""Synthetic examinees for simulation: where their true abilities come from.

A run's simulated examinees are one value object, :class:`Population`: their true
abilities, the run seed, and the bank their answers are drawn from.  Its abilities are
given directly or drawn from an ability specification (:meth:`Population.drawn`).

An ability specification is a short text, as typed on the command line:

``normal:MEAN,SD``
    true theta drawn from a normal distribution;
``uniform:LO,HI``
    drawn uniformly on [LO, HI];
``grid:LO,HI,POINTS:PER_POINT``
    POINTS equally spaced abilities from LO to HI, each given to PER_POINT examinees
    (for conditional studies: the number of examinees is POINTS x PER_POINT);
``correlated_normal:MEAN,SD,CORRELATION``
    for a bank of K ability dimensions: every dimension N(MEAN, SD^2), every pair of
    dimensions correlated CORRELATION (a multivariate normal); on a K-dimensional bank
    ``normal:`` and ``uniform:`` draw each dimension on its own (correlation 0);
``file:PATH``
    the abilities listed in a CSV file (a column named ``theta`` or ``true_theta``, or a
    single column without header); the number of examinees is the number of rows.

A ``grid:`` or ``file:`` specification fixes the number of examinees: a run takes it as
its default, and a different explicit number is an error (:func:`examinee_count`).

A design for an ability vector has one more source, not written as text: its own prior,
the multivariate normal of ``[scoring] prior_mean`` and ``prior_covariance``
(:func:`design_prior_abilities`).  It is the default population of ``simulate``, ``tune``
and ``exposure calibrate`` for a bank of two or more dimensions; one-dimensional runs keep
``normal:0,1``.

Abilities are drawn once for the whole run from the run's seed, so they do not depend on
how the run is cut into chunks or spread over workers.
"""

from __future__ import annotations

import csv
import math
import numbers
from pathlib import Path
from typing import TYPE_CHECKING

import attrs
import numpy as np

from ..errors import AdaptiveEngineError, SimulationError
from ..files import decode_input_text, read_input_bytes

if TYPE_CHECKING:
    from ..bank.item_bank import ItemBank

KINDS = ("normal", "uniform", "grid", "file", "correlated_normal", "multivariate_normal")
#: the kinds a specification text may name (``multivariate_normal`` comes from a design's prior)
WRITTEN_KINDS = KINDS[:5]
#: the ability specification of a one-dimensional run when none is given
DEFAULT_ABILITIES = "normal:0,1"
#: Most simulated examinees in one run.  Results are held in memory (about 300 bytes per
#: examinee, plus the examinees.csv text): a million examinees need about 0.5 GB and a few
#: minutes on two cores; larger studies are several runs with different seeds.
MAX_EXAMINEES = 1_000_000
#: Largest ability file read, in bytes (16 MiB: a million abilities and more).
MAX_ABILITY_FILE_BYTES = 16 * 2**20
#: Examinees of a run when neither the caller nor the ability specification says.
DEFAULT_EXAMINEES = 1000
#: Sub-stream of the run seed that true abilities are drawn from.
_ABILITY_STREAM = 0x7E7A


class AbilitySpecError(AdaptiveEngineError):
    """An ability specification cannot be read (located at ``abilities``)."""


@attrs.frozen(kw_only=True)
class AbilitySpec:
    """Where the true abilities of synthetic examinees come from.

    Attributes
    ----------
    kind : str
        ``normal``, ``uniform``, ``grid``, ``file``, ``correlated_normal`` or
        ``multivariate_normal``.
    values : tuple of float
        (mean, sd), (lo, hi), (lo, hi, points, per_point), (mean, sd, correlation); empty for
        ``file``; (mean vector, covariance rows) for ``multivariate_normal``.
    thetas : tuple of float
        The listed abilities of a ``file`` specification.
    text : str
        The specification as written.
    """

    kind: str = attrs.field(validator=attrs.validators.in_(KINDS))
    values: tuple = ()
    thetas: tuple = ()
    text: str = ""

    @property
    def fixed_count(self) -> int | None:
        """Number of examinees the specification itself fixes (grid, file), else None."""
        if self.kind == "grid":
            return int(self.values[2]) * int(self.values[3])
        if self.kind == "file":
            return len(self.thetas)
        return None

    def draw(self, n: int, seed: int) -> np.ndarray:
        """True abilities of examinees 0..n-1, shape (n,).

        ``grid`` and ``file`` specifications repeat their list cyclically when ``n`` is
        larger than the count they fix (and take its first ``n`` entries when smaller).
        """
        if n < 0:
            raise AbilitySpecError(f"the number of examinees must be >= 0, got {n}", "n_examinees")
        _check_count(n)
        if self.kind == "normal":
            mean, sd = self.values
            return mean + sd * _generator(seed).standard_normal(n)
        if self.kind == "uniform":
            lo, hi = self.values
            return lo + (hi - lo) * _generator(seed).random(n)
        if self.kind in ("correlated_normal", "multivariate_normal"):
            raise AbilitySpecError(f"{self.text!r} draws ability vectors: it needs a bank of several "
                                   "dimensions", "abilities")
        if self.kind == "grid":
            lo, hi, points, per_point = self.values
            base = np.repeat(np.linspace(lo, hi, int(points)), int(per_point))
        else:
            base = np.asarray(self.thetas, dtype=float)
        return np.resize(base, n)


def draw_vectors(spec: AbilitySpec, n: int, seed: int, k: int) -> np.ndarray:
    """True ability vectors of examinees 0..n-1 for a bank of ``k`` dimensions, shape (n, k).

    ``correlated_normal`` draws from the multivariate normal with equal correlations;
    ``normal`` and ``uniform`` draw each dimension on its own.
    """
    if n < 0:
        raise AbilitySpecError(f"the number of examinees must be >= 0, got {n}", "n_examinees")
    _check_count(n)
    rng = _generator(seed)
    if spec.kind == "correlated_normal":
        mean, sd, rho = spec.values
        if k > 1 and rho < -1.0 / (k - 1):
            raise AbilitySpecError(f"a correlation of {rho:g} between each pair of {k} dimensions is not a "
                                   f"correlation matrix (at least {-1.0 / (k - 1):g})", "abilities")
        corr = np.full((k, k), rho)
        np.fill_diagonal(corr, 1.0)
        z = rng.standard_normal((n, k)) @ np.linalg.cholesky(corr).T
        return mean + sd * z
    if spec.kind == "multivariate_normal":
        mean, cov = (np.asarray(v, dtype=float) for v in spec.values)
        if mean.shape != (k,):
            raise AbilitySpecError(f"{spec.text} has {mean.size} dimensions; the bank has {k}", "abilities")
        # as correlated_normal: with mean 0 and unit variances the same draws
        return mean + rng.standard_normal((n, k)) @ np.linalg.cholesky(cov).T
    if spec.kind == "normal":
        mean, sd = spec.values
        return mean + sd * rng.standard_normal((n, k))
    if spec.kind == "uniform":
        lo, hi = spec.values
        return lo + (hi - lo) * rng.random((n, k))
    raise AbilitySpecError(f"{spec.text!r} lists one ability per examinee; a bank of {k} dimensions needs "
                           "correlated_normal:MEAN,SD,CORRELATION, normal:MEAN,SD or uniform:LO,HI", "abilities")


def design_prior_abilities(design, bank: "ItemBank") -> AbilitySpec:
    """The design's own prior as the population: ability vectors from the multivariate normal
    with ``[scoring] prior_mean`` and ``prior_covariance`` (N(0, I) scaled by ``prior_sd``
    when the design gives no covariance), for the bank's K dimensions."""
    from ..kernel.multidimensional_state import prior_of

    mean, cov = prior_of(design, bank.n_dimensions)
    numbers = ", ".join(f"{x:g}" for x in mean)
    rows = ", ".join("[" + ", ".join(f"{x:g}" for x in row) + "]" for row in cov)
    return AbilitySpec(kind="multivariate_normal",
                       values=(tuple(float(x) for x in mean), tuple(tuple(float(x) for x in row) for row in cov)),
                       text=f"design prior: multivariate normal, mean [{numbers}], covariance [{rows}]")


def run_abilities(text: str | None, design, bank: "ItemBank") -> AbilitySpec:
    """The population of a run: ``text`` when given (:func:`parse_ability_spec`); else the
    design's prior on a bank of two or more dimensions (:func:`design_prior_abilities`) and
    :data:`DEFAULT_ABILITIES` otherwise."""
    if text is not None:
        return parse_ability_spec(text)
    if bank.n_dimensions > 1:
        return design_prior_abilities(design, bank)
    return parse_ability_spec(DEFAULT_ABILITIES)


def examinee_count(spec: AbilitySpec, n: int | None, *, default: int) -> int:
    """Number of examinees of a run: ``n`` as given, else the count the spec fixes, else ``default``.

    Raises
    ------
    AbilitySpecError
        Located at ``n_examinees`` when ``n`` is below 1 or differs from the count a
        ``grid:``/``file:`` specification fixes (cycling its list would give the grid
        points, or the file's rows, unequal numbers of examinees).
    """
    fixed = spec.fixed_count
    if n is None:
        return _check_count(int(fixed if fixed is not None else default))
    if n < 1:
        raise AbilitySpecError(f"the number of examinees must be >= 1, got {n}", "n_examinees")
    _check_count(n)
    if fixed is not None and n != fixed:
        what = ("POINTS x PER_POINT" if spec.kind == "grid" else "one per row of the file")
        raise AbilitySpecError(f"the abilities {spec.text} fix {fixed} examinees ({what}), not {n}; "
                               f"leave the number of examinees out or give {fixed}", "n_examinees")
    return int(n)


def _check_count(n: int) -> int:
    """``n`` itself, refused beyond :data:`MAX_EXAMINEES` before anything is allocated."""
    if n > MAX_EXAMINEES:
        raise AbilitySpecError(f"at most {MAX_EXAMINEES:,} examinees per run, got {n:,}; "
                               "run a larger study as several runs with different seeds", "n_examinees")
    return n


def _generator(seed: int) -> np.random.Generator:
    return np.random.default_rng(np.random.SeedSequence([int(seed) % (1 << 63), _ABILITY_STREAM]))


def _numbers(body: str, count: int, text: str) -> list[float]:
    parts = [p.strip() for p in body.split(",")]
    if len(parts) != count or not all(parts):
        raise AbilitySpecError(f"expected {count} comma-separated numbers after the colon in {text!r}", "abilities")
    out = []
    for p in parts:
        try:
            x = float(p)
        except ValueError:
            raise AbilitySpecError(f"{p!r} is not a number in {text!r}", "abilities") from None
        if not math.isfinite(x):
            raise AbilitySpecError(f"{p!r} is not a finite number in {text!r}", "abilities")
        out.append(x)
    return out


def parse_ability_spec(text: str, *, base_dir: str | Path | None = None) -> AbilitySpec:
    """Read an ability specification (see the module docstring).

    Parameters
    ----------
    text : str
        ``normal:0,1``, ``uniform:-3,3``, ``grid:-3,3,13:200`` or ``file:abilities.csv``.
    base_dir : path, optional
        Directory a relative ``file:`` path is resolved against (default: current).
    """
    text = str(text).strip()
    kind, sep, body = text.partition(":")
    kind = kind.strip().lower()
    if not sep or kind not in WRITTEN_KINDS:
        raise AbilitySpecError(
            f"unknown ability specification {text!r}; use normal:MEAN,SD, uniform:LO,HI, "
            "grid:LO,HI,POINTS:PER_POINT, file:PATH or correlated_normal:MEAN,SD,CORRELATION", "abilities")
    if kind == "correlated_normal":
        mean, sd, rho = _numbers(body, 3, text)
        if sd < 0 or not -1 < rho < 1:
            raise AbilitySpecError(f"the SD must be >= 0 and the correlation strictly between -1 and 1 in {text!r}",
                                   "abilities")
        return AbilitySpec(kind=kind, values=(mean, sd, rho), text=text)
    if kind == "normal":
        mean, sd = _numbers(body, 2, text)
        if sd < 0:
            raise AbilitySpecError(f"the SD must be >= 0 in {text!r}", "abilities")
        return AbilitySpec(kind=kind, values=(mean, sd), text=text)
    if kind == "uniform":
        lo, hi = _numbers(body, 2, text)
        if hi < lo:
            raise AbilitySpecError(f"LO must not exceed HI in {text!r}", "abilities")
        return AbilitySpec(kind=kind, values=(lo, hi), text=text)
    if kind == "grid":
        range_part, sep2, per = body.partition(":")
        if not sep2:
            raise AbilitySpecError(f"a grid needs LO,HI,POINTS:PER_POINT, got {text!r}", "abilities")
        lo, hi, points = _numbers(range_part, 3, text)
        (per_point,) = _numbers(per, 1, text)
        if hi < lo or points < 1 or per_point < 1 or points != int(points) or per_point != int(per_point):
            raise AbilitySpecError(
                f"a grid needs LO <= HI and whole POINTS, PER_POINT >= 1, got {text!r}", "abilities")
        if points * per_point > MAX_EXAMINEES:
            raise AbilitySpecError(f"the grid {text!r} asks for {points * per_point:.4g} examinees "
                                   f"(POINTS x PER_POINT); at most {MAX_EXAMINEES:,}", "abilities")
        return AbilitySpec(kind=kind, values=(lo, hi, int(points), int(per_point)), text=text)
    path = Path(body.strip())
    if base_dir is not None and not path.is_absolute():
        path = Path(base_dir) / path
    return AbilitySpec(kind="file", thetas=tuple(read_ability_file(path)), text=text)


def read_ability_file(path: str | Path) -> list[float]:
    """Abilities listed in a CSV file (column ``theta``/``true_theta``, or one bare column)."""
    path = Path(path)
    data = read_input_bytes(path, max_bytes=MAX_ABILITY_FILE_BYTES, error=AbilitySpecError,
                            missing=f"ability file not found: {path}")
    text = decode_input_text(data, error=AbilitySpecError, location=str(path))
    rows = [(i + 1, r) for i, r in enumerate(csv.reader(text.splitlines())) if any(c.strip() for c in r)]
    if not rows:
        raise AbilitySpecError("the ability file is empty", f"{path.name} line 1")
    header = [c.strip().lower() for c in rows[0][1]]
    column, start = 0, 0
    for name in ("theta", "true_theta"):
        if name in header:
            column, start = header.index(name), 1
            break
    else:
        if len(header) != 1:
            raise AbilitySpecError("expected a column named theta or true_theta",
                                   f"{path.name} line {rows[0][0]}")
        try:
            float(header[0])
        except ValueError:
            start = 1  # a one-column header with another name
    out = []
    problems = []
    for line_no, row in rows[start:]:
        raw = row[column].strip() if column < len(row) else ""
        try:
            x = float(raw)
        except ValueError:
            x = math.nan
        if not math.isfinite(x):
            problems.append((f"{path.name} line {line_no}", f"theta {raw!r} is not a finite number"))
        out.append(x)
    if problems:
        from ..errors import Problem

        raise AbilitySpecError([Problem(loc, msg) for loc, msg in problems[:20]])
    if not out:
        raise AbilitySpecError("the ability file lists no abilities", f"{path.name}")
    if len(out) > MAX_EXAMINEES:
        raise AbilitySpecError(f"the ability file lists {len(out):,} abilities, one per examinee; "
                               f"at most {MAX_EXAMINEES:,}", f"{path.name}")
    return out


def _theta_array(value) -> np.ndarray:
    try:
        return np.asarray(value, dtype=float)
    except (TypeError, ValueError):
        raise SimulationError(f"true abilities must be numbers, got {value!r}", "true_theta") from None


@attrs.frozen(kw_only=True, eq=False)
class Population:
    """The simulated examinees of a run.

    Attributes
    ----------
    true_theta : float array, shape (N,)
        True abilities: finite, at least one.
    seed : int
        Run seed: examinee seeds, test decisions and simulated answers derive from it.
    true_bank : ItemBank, optional
        Bank the answers are drawn from (the operational bank's item ids; e.g.
        :func:`adaptive_engine.simulation.perturbed_bank`); None: the operational bank.
    abilities : AbilitySpec, optional
        The specification the abilities were drawn from (for the record of a study).

    Raises
    ------
    SimulationError
        Located at ``true_theta`` or ``seed``.
    """

    true_theta: np.ndarray = attrs.field(converter=_theta_array)
    seed: int
    true_bank: "ItemBank | None" = None
    abilities: AbilitySpec | None = None

    def __attrs_post_init__(self) -> None:
        theta = self.true_theta
        if theta.ndim != 1 or theta.size == 0:
            raise SimulationError("at least one examinee is needed: true_theta has shape (N,), N >= 1, "
                                  f"got shape {theta.shape}", "true_theta")
        if not np.all(np.isfinite(theta)):
            raise SimulationError("true abilities must be finite numbers", "true_theta")
        _check_count(theta.size)
        if isinstance(self.seed, (bool, np.bool_)) or not isinstance(self.seed, numbers.Integral):
            raise SimulationError(f"the seed must be a whole number, got {self.seed!r}", "seed")

    @classmethod
    def drawn(cls, abilities: AbilitySpec, *, seed: int, n_examinees: int | None = None,
              default: int = DEFAULT_EXAMINEES, true_bank: "ItemBank | None" = None) -> "Population":
        """Examinees whose abilities are drawn from ``abilities`` with the run seed.

        ``n_examinees``: None takes the count a ``grid:``/``file:`` specification fixes,
        else ``default`` (:func:`examinee_count`).
        """
        n = examinee_count(abilities, n_examinees, default=default)
        return cls(true_theta=abilities.draw(n, seed), seed=seed, true_bank=true_bank, abilities=abilities)

    @property
    def size(self) -> int:
        """Number of examinees, N."""
        return int(self.true_theta.size)
