"""The multidimensional kernel's fixed facts and batch state: ability as a vector of K.

A design runs here when its bank has K > 1 dimensions or when it asks for it (vector
keys, a multidimensional criterion; see
:func:`adaptive_engine.design.bank_fit.runs_multidimensional`); K = 1 is a case of the same
code.  For K <= 3 the posterior of each examinee lives on a product grid of ``points ** K``
points (:class:`MultidimensionalTables`), updated as the one-dimensional kernel does on its
line grid: under decision rules 1 and 2 (``ctx.posterior_form == "log"``) a row is a log
density to which log-probability rows are added (:func:`add_and_moments`); under version 3
(``"scaled"``) a row is the density divided by its sum, multiplied by probability rows
(:func:`scaled_add_and_moments`).  For K = 4 to 6
(:data:`adaptive_engine.design.bank_fit.MAX_KERNEL_DIMENSIONS`) the kernel keeps no grid
(``gridless``): the grid, the log tables and each examinee's posterior row have no points
(nothing of size (B, G) is allocated), the interim and final estimates are MAP with the
covariance ``(P + I(theta))^-1``, MLE started from it, or EAP by adaptive Gauss-Hermite
quadrature around it (:mod:`.multidimensional_quadrature`); the gate refuses every option
that needs the grid.  The bookkeeping of
:mod:`adaptive_engine.kernel.cycle` (answers, blueprint counts, enemies, item sets, pretest
seeding) and the selection machinery of :mod:`adaptive_engine.kernel.selection` (exposure
control, blueprint, eligibility) serve both unchanged.

Every quantity is computed per row, elementwise with fixed-order sums over the K
dimensions (the small matrix inverses and determinants of
:mod:`adaptive_engine.irt.small_matrices`, imported here, are written out by cofactors for
K <= 3, by an elementwise Cholesky factorisation beyond), so a batch gives
bit for bit what one examinee at a time gives.
"""

from __future__ import annotations

import attrs
import numpy as np
from scipy.special import expit

from ..bank.item_bank import ItemBank
from ..design.types import Design, SelectionCriterion, Stopping
from ..errors import AdaptiveEngineError
from ..irt import multidimensional as md
from ..irt.models import log_expit
from ..irt.posterior import BLOCK_VALUES, consecutive_rows, relative_density
from ..irt.small_matrices import (  # noqa: F401 - the kernel's modules import them from here
    cholesky_factor,
    cholesky_inverse,
    determinant,
    inverse,
    matrix_vector,
    quadratic_form,
)
from .state import KernelState


@attrs.frozen(eq=False)
class MultidimensionalTables:
    """What the multidimensional kernel precomputes for one (design, bank).

    Attributes
    ----------
    k : int
        Number of ability dimensions.
    dimension_names : tuple of str
    points : float (G, K)
        The product grid (the first dimension varies slowest).
    axis : float (P,)
        The grid of one dimension (G = P ** K).
    log_table : float (n, G, C)
        Log category probabilities of every item at every grid point.
    params : MultidimensionalParameters (n,)
    prior_mean : float (K,)
    prior_covariance, prior_precision : float (K, K)
    log_prior : float (G,)
        ``-0.5 (x - mu)' P (x - mu)`` at each grid point (constant dropped).
    composite_weights : float (K,) or None
    se_targets : float (K,) or None
        The SE each dimension must reach (``[stopping] se`` on each, or ``se_per_dimension``).
    stopping_rule : Stopping
        The design's stopping rules with the SE target as one flag ("every dimension is at
        its target"), for :func:`adaptive_engine.kernel.stopping.stop_reasons`.
    finite_log_table : float (n, C, G) or None
        The log table with -inf (categories an item lacks) as 0, for Kullback-Leibler.
    logistic_only : bool
        Every item has two categories and no lower asymptote (an M2PL bank).
    slope_products : dict
        ``a_p a_q`` of every item (n,) for p <= q, keyed (p, q) in row-major order (the
        terms of the quadratic forms ``a' M a`` of selection).
    screening : SinglePrecisionItems or None
        The items in single precision, for the D-optimal pick by screening
        (:func:`adaptive_engine.kernel.multidimensional_selection.best_items`); None where
        that pick does not apply (another criterion, not an M2PL bank).
    prior_weights : float (G,)
        The prior as a scaled density, ``exp(log_prior - max) / sum``: the start of every
        row of the scaled posterior (:func:`scaled_add_and_moments`).
    gridless : bool
        K > :data:`adaptive_engine.design.bank_fit.MAX_GRID_DIMENSIONS`: no posterior grid
        (``points`` (0, K), ``axis`` (0,), ``log_table`` (n, 0, C), ``log_prior`` (0,)); the
        estimates are MAP, MLE or EAP by quadrature around the MAP.
    """

    k: int
    dimension_names: tuple
    points: np.ndarray
    axis: np.ndarray
    log_table: np.ndarray
    params: md.MultidimensionalParameters
    prior_mean: np.ndarray
    prior_covariance: np.ndarray
    prior_precision: np.ndarray
    log_prior: np.ndarray
    composite_weights: np.ndarray | None
    se_targets: np.ndarray | None
    stopping_rule: Stopping
    finite_log_table: np.ndarray | None
    logistic_only: bool = False
    slope_products: dict = attrs.field(factory=dict)
    screening: "SinglePrecisionItems | None" = None
    gridless: bool = False
    prior_weights: np.ndarray | None = None
    _made: dict = attrs.field(factory=dict, alias="made")

    def probability_by_category(self) -> np.ndarray:
        """``exp`` of the log table in its (n, C, G) layout, read-only: what an answer
        multiplies a row of the scaled posterior by.  Made on first use (a context holding
        the log posterior never needs it) and kept with the tables."""
        table = self._made.get("probability_by_category")
        if table is None:
            table = np.exp(self.log_table.transpose(0, 2, 1))
            table.setflags(write=False)
            self._made["probability_by_category"] = table
        return table

    def cached(self, name: str, make):
        """``make()``, made on first use under ``name`` and kept with the tables (facts of
        the bank that some paths alone need)."""
        value = self._made.get(name)
        if value is None:
            value = self._made[name] = make()
        return value

    @property
    def axis_points(self) -> int:
        """Grid points per dimension (P, with G = P ** K)."""
        return self.axis.shape[0]


def multidimensional_parameters(bank: ItemBank) -> md.MultidimensionalParameters:
    """The bank's items as multidimensional parameters (M2PL, M3PL, MGRM banks)."""
    if not bank.uses_multidimensional_models:  # pragma: no cover - refused by the gate
        raise AdaptiveEngineError("the multidimensional kernel needs a bank of M2PL, M3PL or MGRM items", "bank")
    return bank.multidimensional_params


def prior_of(design: Design, k: int) -> tuple[np.ndarray, np.ndarray]:
    """The design's prior mean (K,) and covariance (K, K) for an ability of K dimensions."""
    sc = design.scoring
    mean = np.asarray(sc.prior_mean if isinstance(sc.prior_mean, tuple) else (sc.prior_mean,) * k, dtype=float)
    if sc.prior_covariance is not None:
        cov = np.asarray(sc.prior_covariance, dtype=float)
    else:
        cov = np.eye(k) * (sc.prior_sd * sc.prior_sd)
    return mean, cov


def build_tables(design: Design, bank: ItemBank) -> MultidimensionalTables:
    """Precompute the multidimensional facts of ``design`` on ``bank`` (the pair has passed the gate)."""
    from ..design.bank_fit import MAX_GRID_DIMENSIONS, multidimensional_grid_points

    params = multidimensional_parameters(bank)
    k = params.n_dimensions
    sc = design.scoring
    gridless = k > MAX_GRID_DIMENSIONS
    # no grid: an axis of no points makes every grid-sized array empty
    p = 0 if gridless else multidimensional_grid_points(design, k)
    axis = np.round(np.linspace(sc.grid_min, sc.grid_max, p), 12)
    mesh = np.meshgrid(*([axis] * k), indexing="ij")
    points = np.stack([m.reshape(-1) for m in mesh], axis=1)  # (G, K)
    logistic = bool(np.all(params.n_categories == 2) and np.all(params.c == 0))
    # (n, C, G), the layout the posterior update reads; log_table is its (n, G, C) view
    by_category = np.empty((bank.n_items, params.max_categories, points.shape[0]))
    for start in range(0, bank.n_items if p else 0, 500):
        stop = min(start + 500, bank.n_items)
        chunk = params.take(np.arange(start, stop))
        if not (logistic and _logistic_log_table(chunk, points, by_category[start:stop])):
            by_category[start:stop] = md.log_probabilities(*md.outer(chunk, points)).transpose(0, 2, 1)
    log_table = by_category.transpose(0, 2, 1)
    mean, cov = prior_of(design, k)
    precision = inverse(cov)
    log_prior = -0.5 * quadratic_form(points - mean, precision)
    if gridless:
        prior_weights = np.empty(0)
    else:
        prior_weights = np.exp(log_prior - np.max(log_prior))
        prior_weights = prior_weights / np.sum(prior_weights)
    weights = design.reporting.composite_weights
    st = design.stopping
    if st.se_per_dimension is not None:
        targets = np.asarray(st.se_per_dimension, dtype=float)
    elif st.se is not None:
        targets = np.full(k, st.se)
    else:
        targets = None
    rule = attrs.evolve(st, se=None if targets is None else 1.0, se_per_dimension=None)
    products = {(p, q): params.slopes[:, p] * params.slopes[:, q] for p in range(k) for q in range(p, k)}
    finite = None
    if design.selection.kl_over_posterior:
        finite = np.ascontiguousarray(np.where(np.isfinite(log_table), log_table, 0.0).transpose(0, 2, 1))
    return MultidimensionalTables(
        k=k, dimension_names=tuple(bank.dimension_names), points=points, axis=axis, log_table=log_table,
        params=params, prior_mean=mean, prior_covariance=cov, prior_precision=precision, log_prior=log_prior,
        composite_weights=None if weights is None else np.asarray(weights, dtype=float),
        se_targets=targets, stopping_rule=rule, finite_log_table=finite,
        logistic_only=logistic,
        slope_products=products,
        screening=SinglePrecisionItems.of(params, products) if (
            design.selection.criterion is SelectionCriterion.D_OPTIMALITY and logistic) else None,
        prior_weights=prior_weights,
        gridless=gridless,
    )


def _logistic_log_table(params: md.MultidimensionalParameters, points: np.ndarray, out: np.ndarray) -> bool:
    """Log probabilities of M2PL items (two categories, no lower asymptote) on ``points``
    into ``out`` (n, 2, G), the values :func:`adaptive_engine.irt.multidimensional.log_probabilities`
    gives, in fewer passes; False (``out`` untouched) where a logit is not finite.

    There, with ``z = D (a . x + d)``, category 0 is ``log_expit(+inf) + log_expit(-z) +
    log(-expm1(z - inf))`` = ``(-0.0 + log_expit(-z)) + 0.0`` and category 1 is
    ``(log_expit(z) + -0.0) + 0.0`` (``log(1) = 0``): adding -0.0 changes no value, adding
    +0.0 only turns -0.0 into +0.0, so ``log_expit(-+z) + 0.0`` is each, bit for bit.
    """
    eta = md.projection(md.outer(params, points)[0], points)  # (n, G)
    z = params.scaling * (eta + params.intercepts[:, :1])
    if not np.all(np.isfinite(z)):
        return False
    np.add(log_expit(-z), 0.0, out=out[:, 0, :])
    np.add(log_expit(z), 0.0, out=out[:, 1, :])
    return True


@attrs.frozen(eq=False)
class SinglePrecisionItems:
    """An M2PL bank's items in single precision, and the magnitudes that bound its rounding.

    Attributes
    ----------
    linear : float32 (K + 1, n)
        The slopes and, in the last row, the intercepts: ``z = [theta, 1] . linear``.
    products : float32 (K (K + 1) / 2, n)
        ``a_p a_q`` in the order of :attr:`MultidimensionalTables.slope_products`.
    largest_slope : float (K,)
        The largest ``|a_k|`` of the bank on each dimension.
    largest_intercept : float
        The largest ``|d|`` of the bank.
    scaled_linear : float32 (K + 1, n)
        ``D`` times :attr:`linear` (each rounded once from double): ``D z = [theta, 1] .
        scaled_linear`` (the screening of decision rules version 3).
    """

    linear: np.ndarray
    products: np.ndarray
    largest_slope: np.ndarray
    largest_intercept: float
    scaled_linear: np.ndarray

    @classmethod
    def of(cls, params: md.MultidimensionalParameters, products: dict) -> "SinglePrecisionItems":
        slopes = params.slopes
        intercepts = params.intercepts[:, 0]
        linear = np.vstack([slopes.T, intercepts[None, :]])
        return cls(linear=np.ascontiguousarray(linear, dtype=np.float32),
                   scaled_linear=np.ascontiguousarray(params.scaling * linear, dtype=np.float32),
                   products=np.stack([v for v in products.values()]).astype(np.float32),
                   largest_slope=np.max(np.abs(slopes), axis=0),
                   largest_intercept=float(np.max(np.abs(intercepts))))


def test_information_and_score(tab: MultidimensionalTables, items, responses, theta, precision, *,
                               score: bool = False, given: "GivenItems | None" = None, one_row_in_order: bool = False):
    """``P + sum_i J_i(theta) a_i a_i'`` (R, K, K) and, with ``score``, the gradient of the
    log-likelihood ``sum_i r_i(theta) a_i`` (R, K) over the items given.

    ``items`` and ``responses`` are (R, W), -1 where nothing (or a pretest item) was given.
    The sums run column by column, in the order the items were given, so that a row's sum
    is the same whatever other rows (and how many columns) the batch holds: the columns a
    row has not reached add exact zeros.  ``given``: :func:`given_items` of the same items
    and responses, when the caller has gathered them already (an M2PL bank; under
    ``one_row_in_order`` any bank).  ``one_row_in_order`` (decision rules version 3): a
    batch of one row adds its columns in order too (:func:`_sum_in_order`); without it
    (versions 1 and 2) a single row of an M2PL bank is summed pairwise by numpy once it has
    eight answers or more.  Under it a bank with M3PL or MGRM items is computed every
    column at once as well (:func:`_general_information_and_score`, the same values as the
    column-by-column loop that versions 1 and 2 run).
    """
    theta = np.asarray(theta, dtype=float)
    k = tab.k
    if tab.logistic_only:
        if given is None:
            given = given_items(tab, items, responses if score else None)
        return _logistic_information_and_score(tab, given.reached(), theta, precision, score=score,
                                               one_row_in_order=one_row_in_order)
    if one_row_in_order:
        if given is None:
            given = given_items(tab, items, responses if score else None)
        return general_information_and_score(tab, given.reached(), theta, precision, score=score)
    width = items.shape[1]
    reached = np.flatnonzero((items >= 0).any(axis=0))
    reached = reached[reached < width]
    info = np.array(precision, dtype=float, copy=True)
    grad = np.zeros(theta.shape) if score else None
    for col in reached:
        it = items[:, col]
        given = it >= 0
        params = tab.params.take(np.maximum(it, 0))
        a = params.slopes
        j = np.where(given, md.slope_information(params, theta), 0.0)
        for p in range(k):
            for q in range(p, k):
                info[:, p, q] = info[:, p, q] + j * a[:, p] * a[:, q]
                if q != p:
                    info[:, q, p] = info[:, p, q]
        if score:
            grad = grad + md.log_likelihood_gradient(params, theta, np.where(given, responses[:, col], -1))
    return info, grad


@attrs.frozen(eq=False)
class GivenItems:
    """The items given to rows of a batch, gathered once, one column per answer: arrays
    (L, R) -- the answers down the first axis, the rows along the second (the layout in
    which a sum over each row's answers, in order, is one reduction over the first axis).

    Attributes
    ----------
    given : bool (L, R)
        Where a scored item was given.
    columns : float (K + M, L, R)
        The items' slopes on each dimension and, after them, their intercepts (M = 1 on an
        M2PL bank; the bank's widest M otherwise, NaN beyond an item's own), each one
        contiguous array, so that the elementwise passes read no strides.
    responses : int (L, R) or None
        The answers (None where only the information is wanted).
    k : int
        K, the number of slope rows of ``columns``.
    c : float (L, R) or None
        The items' lower asymptotes (None on an M2PL bank, where all are 0).
    top : int (L, R) or None
        The items' highest category M (None on an M2PL bank, where all are 1).
    index : int (L, R) or None
        The items' positions in the bank, 0 where none was given (None on an M2PL bank).
    """

    given: np.ndarray
    columns: np.ndarray
    responses: np.ndarray
    k: int = -1
    c: np.ndarray | None = None
    top: np.ndarray | None = None
    index: np.ndarray | None = None

    @property
    def slopes(self) -> np.ndarray:
        """(K, L, R)"""
        return self.columns[: self._k]

    @property
    def intercepts(self) -> np.ndarray:
        """(L, R): the first intercept (an M2PL or M3PL item's only one)"""
        return self.columns[self._k]

    @property
    def boundaries(self) -> np.ndarray:
        """(M, L, R): every intercept"""
        return self.columns[self._k :]

    @property
    def _k(self) -> int:
        return self.columns.shape[0] - 1 if self.k < 0 else self.k

    def _select(self, given, columns, responses, pick) -> "GivenItems":
        # every array C-contiguous again (numpy's fancy indexing need not give that layout)
        def picked(x):
            return None if x is None else np.ascontiguousarray(pick(x))

        return GivenItems(given=given, columns=np.ascontiguousarray(columns), responses=responses, k=self.k,
                          c=picked(self.c), top=picked(self.top), index=picked(self.index))

    def rows(self, index) -> "GivenItems":
        """The same for some of the rows (``index`` into the last axis)."""
        return self._select(self.given[:, index], self.columns[:, :, index],
                            None if self.responses is None else self.responses[:, index], lambda x: x[:, index])

    def reached(self) -> "GivenItems":
        """Only the columns some row has reached (as :func:`test_information_and_score`
        sums them: a column no row reached is not added at all)."""
        cols = np.flatnonzero(self.given.any(axis=1))
        if cols.size == self.given.shape[0]:
            return self
        return self._select(self.given[cols], self.columns[:, cols],
                            None if self.responses is None else self.responses[cols], lambda x: x[cols])


def given_items(tab: MultidimensionalTables, items, responses, *, general: bool = False) -> GivenItems:
    """:class:`GivenItems` of ``items`` and ``responses`` (R, W), -1 where nothing was given:
    on an M2PL bank the slopes and first intercepts alone unless ``general`` (the layout of
    :func:`general_information_and_score`, which every other bank gets)."""
    at = np.ascontiguousarray(np.asarray(items).T)
    index = np.maximum(at, 0)
    params = tab.params
    answers = None if responses is None else np.ascontiguousarray(np.asarray(responses).T)
    if tab.logistic_only and not general:
        columns = np.vstack([params.slopes.T, params.intercepts[:, :1].T])  # (K + 1, n)
        return GivenItems(given=at >= 0, columns=columns[:, index], responses=answers)
    columns = tab.cached("item_columns",  # (K + M, n)
                         lambda: np.ascontiguousarray(np.vstack([params.slopes.T, params.intercepts.T])))
    return GivenItems(given=at >= 0, columns=np.ascontiguousarray(columns[:, index]), responses=answers, k=tab.k,
                      c=params.c[index], top=params.n_categories[index] - 1, index=index)


def _logistic_information_and_score(tab, given: GivenItems, theta, precision, *, score, one_row_in_order=False):
    """:func:`test_information_and_score` for a bank of M2PL items, every column at once.

    ``P = expit(D (a . theta + d))``, ``J = D^2 P (1 - P)``, score ``D (x - P)``, elementwise
    over the (L, R) columns of ``given``; the sums over the columns run in their order (a
    reduction over the first axis of an array whose rows are the columns adds one after
    another, the start value first), so every value is the one adding a column at a time
    gives.
    """
    k = tab.k
    a = given.slopes  # (K, L, R)
    scaling = tab.params.scaling
    # a . theta, the dimensions in order (as md.projection sums them)
    eta = a[0] * theta[None, :, 0]
    for d in range(1, k):
        eta = eta + a[d] * theta[None, :, d]
    prob = expit(scaling * (eta + given.intercepts))
    j = np.where(given.given, (scaling * scaling) * prob * (1.0 - prob), 0.0)
    # without a grid (K > 3) the sums run in order for a batch of one row too, under every
    # version of the rules (such banks are run from version 3 on)
    in_order = one_row_in_order or tab.gridless
    info = _precision_plus_information(precision, j, a, in_order)
    if not score:
        return info, None
    r = np.where(given.given, scaling * (given.responses - prob), 0.0)
    grad = np.stack([_sum_in_order(np.zeros(theta.shape[0]), r * a[d], in_order) for d in range(k)], axis=1)
    return info, grad


def general_information_and_score(tab, given: GivenItems, theta, precision, *, score):
    """:func:`test_information_and_score` for a bank with M3PL or MGRM items, every column at once.

    ``given`` in the general layout (:func:`given_items`; on an M2PL bank with
    ``general``), only columns some row reached; ``precision`` (R, K, K) is where the sums
    start (zeros for the test information alone, as the MLE sums it).

    Each answer's ``J`` and score ``r`` are computed elementwise over the (L, R) columns of
    ``given`` by the formulas of :mod:`adaptive_engine.irt.multidimensional`, operation for
    operation (so each value is the one :func:`adaptive_engine.irt.multidimensional.slope_information`
    and :func:`~adaptive_engine.irt.multidimensional.log_likelihood_gradient` give for that
    item and row): ``J`` of a two-category item (M2PL, M3PL) by Lord's closed form, of a
    graded item (MGRM) by Samejima's sum over its categories, in linear space; the score of
    category x is ``D (Q*_x - P*_x+1)``, and with a lower asymptote the top category's
    ``D (1 - c) P* Q* / P_M`` in logs.  The graded items' and the lifted top categories'
    terms are computed for those answers alone.  The sums over the answers run in their
    order (:func:`_sum_in_order`, a batch of one row too), as the column-by-column loop adds
    them.
    """
    k = tab.k
    scaling = tab.params.scaling
    a = given.slopes  # (K, L, R)
    eta = a[0] * theta[None, :, 0]
    for d in range(1, k):
        eta = eta + a[d] * theta[None, :, d]
    c, top = given.c, given.top
    # Lord's closed form for every answer; graded items' values are replaced below
    z = scaling * (eta + given.intercepts)
    e = np.exp(-np.clip(z, -700.0, 700.0))
    s = 1.0 / (1.0 + e)
    t = e * s
    p1 = c + (1.0 - c) * s
    num = (scaling * scaling) * (1.0 - c) * s * s * t
    j = np.divide(num, p1, out=np.zeros(num.shape), where=p1 > 1e-300)
    graded = given.given & (top > 1)
    if graded.any():
        if np.all(c[graded] == 0):
            # (n, M) in C order: the sum over categories then runs as the model computes it
            cuts = np.ascontiguousarray(np.moveaxis(given.boundaries, 0, -1)[graded])
            j[graded] = _graded_information(scaling, eta[graded], cuts)
        else:  # graded items with a lower asymptote: the model's own choice item by item
            rows = np.broadcast_to(theta[None, :, :], given.given.shape + (k,))[graded]
            j[graded] = md.slope_information(tab.params.take(given.index[graded]), rows)
    j = np.where(given.given, j, 0.0)
    info = _precision_plus_information(precision, j, a, True)
    if not score:
        return info, None
    r = _category_scores(scaling, eta, given)
    grad = np.stack([_sum_in_order(np.zeros(theta.shape[0]), r * a[d], True) for d in range(k)], axis=1)
    return info, grad


def answer_log_likelihood(tab, given: GivenItems, theta) -> np.ndarray:
    """``sum_i log P(x_i | theta)`` (R,) over the answers of ``given`` (general layout), added
    one answer after another in the order given (:func:`_sum_in_order`, a batch of one row
    too).

    Each answer's ``log P_x`` is computed for its category alone by the operations of
    :func:`adaptive_engine.irt.multidimensional.log_probabilities`:
    ``log sigma(z_x) + log sigma(-z_x+1) + log(1 - exp(z_x+1 - z_x))`` (``z_0 = +inf``,
    ``z_M+1 = -inf``), plus ``log(1 - c)`` with a lower asymptote, whose top category is
    ``log(c + (1 - c) sigma(z_M))`` instead (the model adds ``log(1 - c) = -0.0`` and takes
    that form for items without one too once any item of the array has one, which can
    differ only in the sign of a zero).
    """
    scaling = tab.params.scaling
    a = given.slopes
    eta = a[0] * theta[None, :, 0]
    for d in range(1, tab.k):
        eta = eta + a[d] * theta[None, :, d]
    upper, lower, x = _answer_logits(scaling, eta, given)
    with np.errstate(invalid="ignore", divide="ignore"):
        log_p = log_expit(upper) + log_expit(-lower) + np.log(-np.expm1(lower - upper))
    log_p = np.where(np.isnan(log_p), -np.inf, log_p)
    lifted = given.given & (given.c > 0)
    if lifted.any():
        c = given.c[lifted]
        log_1c = np.log1p(-c)
        top = x[lifted] == given.top[lifted]
        below = log_p[lifted] + log_1c
        with np.errstate(divide="ignore"):
            at_top = np.logaddexp(np.log(c), log_1c + log_expit(upper[lifted]))
        log_p[lifted] = np.where(top, at_top, below)
    terms = np.where(given.given, log_p, 0.0)
    return _sum_in_order(np.zeros(theta.shape[0]), terms, True)


def _answer_logits(scaling, eta, given: GivenItems):
    """The logits of the boundaries above and below each answer's category (L, R):
    ``z_x`` (+inf for x = 0) and ``z_x+1`` (-inf at the item's top), and the categories."""
    x = np.where(given.given, given.responses, 0)
    cuts = given.boundaries
    width = cuts.shape[0]
    above = np.take_along_axis(cuts, np.clip(x - 1, 0, width - 1)[None], axis=0)[0]
    below = np.take_along_axis(cuts, np.clip(x, 0, width - 1)[None], axis=0)[0]
    with np.errstate(invalid="ignore"):
        upper = np.where(x == 0, np.inf, scaling * (eta + above))
        lower = np.where(x >= given.top, -np.inf, scaling * (eta + below))
    return upper, lower, x


def _graded_information(scaling, eta, cuts) -> np.ndarray:
    """``J`` (n,) of graded items without a lower asymptote at ``eta`` (n,), intercepts
    ``cuts`` (n, M), NaN beyond an item's own: the operations of
    :func:`adaptive_engine.irt.multidimensional._graded_slope_information`."""
    z = scaling * (eta[:, None] + cuts)
    z = np.where(np.isnan(cuts), -np.inf, z)
    zz = np.concatenate([np.full((z.shape[0], 1), np.inf), z, np.full((z.shape[0], 1), -np.inf)], axis=1)
    star, star_c = md.expit(zz), md.expit(-zz)
    with np.errstate(invalid="ignore"):
        p = star[:, :-1] * star_c[:, 1:] * -np.expm1(zz[:, 1:] - zz[:, :-1])
    p = np.where(np.isnan(p), 0.0, p)
    r = star_c[:, :-1] - star[:, 1:]
    return (scaling * scaling) * np.sum(p * r * r, axis=-1)


def _category_scores(scaling, eta, given: GivenItems) -> np.ndarray:
    """``d log P_x / d eta`` (L, R) of each answer x, 0 where none was given: the
    operations of :func:`adaptive_engine.irt.multidimensional.log_derivatives` for the
    answered category alone."""
    upper, lower, x = _answer_logits(scaling, eta, given)
    top = given.top
    r = scaling * (md.expit(-upper) - md.expit(lower))
    lifted = given.given & (given.c > 0) & (x == top)
    if lifted.any():
        c = given.c[lifted]
        z_top = upper[lifted]
        log_1c = np.log1p(-c)
        with np.errstate(divide="ignore"):
            log_pm = np.logaddexp(np.log(c), log_1c + log_expit(z_top))
            r[lifted] = scaling * np.exp(np.log1p(-c) + log_expit(z_top) + log_expit(-z_top) - log_pm)
    return np.where(given.given, r, 0.0)


def _precision_plus_information(precision, j, a, in_order: bool) -> np.ndarray:
    """``precision`` (R, K, K) plus the answers' information ``sum_w j a_p a_q`` (``j`` (W, R)
    the slope information of each answer, ``a[p]`` the answers' slopes on dimension p,
    broadcastable with ``j``), each entry summed over the answers in order by
    :func:`_sum_in_order` and the lower triangle copied from the upper."""
    info = np.array(precision, dtype=float, copy=True)
    k = info.shape[-1]
    for p in range(k):
        for q in range(p, k):
            info[:, p, q] = _sum_in_order(info[:, p, q], j * a[p] * a[q], in_order)
            if q != p:
                info[:, q, p] = info[:, p, q]
    return info


def _sum_in_order(start: np.ndarray, terms: np.ndarray, one_row_in_order: bool = False) -> np.ndarray:
    """``(((start + t_0) + t_1) + ..)`` per column of ``terms`` (L, R): one row after another.

    numpy reduces over the first axis of a C-ordered array by adding each row to the
    running result in turn (no pairwise or blocked summation, which it applies along a
    contiguous axis only), as ``np.add.accumulate`` along the columns does
    (tests/test_multidimensional_fast_paths.py compares the two).  A single column
    (R = 1) is such a contiguous axis: with ``one_row_in_order`` it is summed by
    ``np.add.accumulate``, in order, as in a batch of many rows.
    """
    if terms.shape[0] == 0:
        return start.copy()
    stacked = np.empty((terms.shape[0] + 1,) + start.shape)
    stacked[0] = start
    stacked[1:] = terms
    if one_row_in_order and stacked.shape[1] == 1:
        return np.add.accumulate(stacked, axis=0)[-1]
    return np.add.reduce(stacked, axis=0)


# ----------------------------------------------------------------------------------------
# the posterior on the grid


def posterior_moments(log_post: np.ndarray, points: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Posterior mean (R, K) and covariance (R, K, K) of log posteriors (R, G) on ``points`` (G, K).

    Sums over each row's grid alone; the covariance is ``E[x_i x_j] - E[x_i] E[x_j]`` (on
    a grid within +-20 that loses at most four of sixteen digits, as in the
    one-dimensional :func:`adaptive_engine.irt.posterior.posterior_mean_sd`).
    """
    return _moments(log_post, points, _point_products(points))


def _point_products(points: np.ndarray) -> dict:
    """``x_i x_j`` of every grid point for i <= j, the weights of the second moments."""
    k = points.shape[1]
    return {(i, j): points[:, i] * points[:, j] for i in range(k) for j in range(i, k)}


def _moments(log_post, points, products) -> tuple[np.ndarray, np.ndarray]:
    w = relative_density(log_post)
    total = np.sum(w, axis=1)
    k = points.shape[1]
    mean = np.stack([np.einsum("rg,g->r", w, points[:, j]) / total for j in range(k)], axis=1)
    cov = np.empty((log_post.shape[0], k, k))
    for i in range(k):
        for j in range(i, k):
            second = np.einsum("rg,g->r", w, products[i, j]) / total
            cov[:, i, j] = cov[:, j, i] = second - mean[:, i] * mean[:, j]
    return mean, cov


def add_and_moments(log_post, rows, table=None, items=None, categories=None, points=None, *,
                    moments: bool = True) -> tuple[np.ndarray, np.ndarray] | None:
    """Add answers' log likelihoods to rows of a batch posterior, then their moments.

    For each k, ``table[items[k], categories[k]]`` (a row on the product grid) is added to
    ``log_post[rows[k]]`` in place (nothing where ``items[k] < 0``, nothing at all without
    a ``table``); with ``moments`` the posterior mean and covariance of those rows are
    returned as :func:`posterior_moments` gives them.  The rows go through in blocks that
    fit in the processor's cache (as the one-dimensional
    :func:`adaptive_engine.irt.posterior.add_and_summarize` does), each added to and read
    while it is there: every value is the same, operation for operation, as adding for the
    whole batch and then calling :func:`posterior_moments` on it (each row's sums run over
    that row alone).

    Parameters
    ----------
    log_post : float array (B, G), changed in place
    rows : int array (R,)
        Distinct rows of ``log_post``.
    table : float array (n, C, G), optional
        Log probability of each item's categories on the grid.
    items, categories : int arrays (R,), optional
    points : float array (G, K)
        The grid (needed with ``moments``).

    Returns
    -------
    (mean (R, K), covariance (R, K, K)), or None without ``moments``
    """
    rows = np.asarray(rows, dtype=np.int64)
    r_n = rows.size
    k = 0 if points is None else points.shape[1]
    mean = np.empty((r_n, k))
    cov = np.empty((r_n, k, k))
    if r_n == 0:
        return (mean, cov) if moments else None
    products = _point_products(points) if moments else None
    step = max(1, BLOCK_VALUES // max(1, log_post.shape[-1]))
    # consecutive rows (a whole batch, or the rows still testing in order) are read as views
    consecutive = consecutive_rows(rows)
    adding = table is not None
    every = adding and bool(np.all(items >= 0))
    for i in range(0, r_n, step):
        j = min(i + step, r_n)
        block = log_post[rows[i] : rows[i] + (j - i)] if consecutive else log_post[rows[i:j]]
        if every:
            block += table[items[i:j], categories[i:j]]
        elif adding:
            sel = np.flatnonzero(items[i:j] >= 0)
            block[sel] += table[items[i:j][sel], categories[i:j][sel]]
        if adding and not consecutive:
            log_post[rows[i:j]] = block
        if moments:
            mean[i:j], cov[i:j] = _moments(block, points, products)
    return (mean, cov) if moments else None


#: A row of the scaled posterior whose sum after an answer is below this (or not finite)
#: is made again from logarithms (:func:`scaled_add_and_moments`), so that no row ever
#: underflows to zeros.
RESCUE_BELOW = 1e-250


def scaled_moments(post: np.ndarray, points: np.ndarray, axis: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Posterior mean (R, K), covariance (R, K, K) and the sums (R,) of rows ``post`` (R, G)
    of a density on the product grid ``points`` (G, K) up to a factor per row.

    On a grid of two dimensions (G = P * P, the first dimension varying slowest) each row
    is read three times, as a (P, P) array (:func:`_marginal_sums`): its sums along the
    second dimension ``u_i = sum_j w_ij``, against the second axis ``t_i = sum_j w_ij y_j``,
    and along the first dimension ``v_j = sum_i w_ij``; then every moment is a sum of P
    terms (:func:`_moments_of_marginals`).  Other K: the sum of the whole row and its sums
    against each coordinate and product of coordinates.  Every sum runs within one row
    (``einsum`` along a row's own axes), so a row gives the same bits in a batch of any
    size.  The covariance is ``E[x_i x_j] - E[x_i] E[x_j]``, as :func:`posterior_moments`
    computes it.
    """
    if _on_square_grid(post, points, axis):
        u, t, v = _marginal_sums(post, axis)
        total = np.einsum("ri->r", u)
        mean, cov = _moments_of_marginals(u, t, v, total, axis)
        return mean, cov, total
    r_n, k = post.shape[0], points.shape[1]
    mean = np.empty((r_n, k))
    cov = np.empty((r_n, k, k))
    total = np.einsum("rg->r", post)
    for j in range(k):
        mean[:, j] = np.einsum("rg,g->r", post, points[:, j]) / total
    for i in range(k):
        for j in range(i, k):
            second = np.einsum("rg,g->r", post, points[:, i] * points[:, j]) / total
            cov[:, i, j] = cov[:, j, i] = second - mean[:, i] * mean[:, j]
    return mean, cov, total


def _on_square_grid(post, points, axis) -> bool:
    return points.shape[1] == 2 and post.shape[-1] == axis.shape[0] ** 2


def _marginal_sums(post, axis) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """``u``, ``t``, ``v`` (R, P) of rows ``post`` (R, P * P) on a grid of two dimensions."""
    p = axis.shape[0]
    square = post.reshape(post.shape[0], p, p)
    ones = np.ones(p)
    return (np.einsum("rij,j->ri", square, ones), np.einsum("rij,j->ri", square, axis),
            np.einsum("rij,i->rj", square, ones))


def _moments_of_marginals(u, t, v, total, axis) -> tuple[np.ndarray, np.ndarray]:
    """Mean (R, 2) and covariance (R, 2, 2) from the sums of :func:`_marginal_sums`:
    ``E[x] = sum_i u_i x_i / total``, ``E[x^2]`` likewise with ``x_i^2``, ``E[y]`` and
    ``E[y^2]`` from ``v``, ``E[xy] = sum_i x_i t_i / total``."""
    r_n = u.shape[0]
    mean = np.empty((r_n, 2))
    cov = np.empty((r_n, 2, 2))
    squares = axis * axis
    mean[:, 0] = np.einsum("ri,i->r", u, axis) / total
    mean[:, 1] = np.einsum("rj,j->r", v, axis) / total
    cov[:, 0, 0] = np.einsum("ri,i->r", u, squares) / total - mean[:, 0] * mean[:, 0]
    cov[:, 1, 1] = np.einsum("rj,j->r", v, squares) / total - mean[:, 1] * mean[:, 1]
    cov[:, 0, 1] = cov[:, 1, 0] = np.einsum("ri,i->r", t, axis) / total - mean[:, 0] * mean[:, 1]
    return mean, cov


#: Grid values per block of :func:`scaled_add_and_moments` (512 KB of float64: the block
#: and the product made from it stay in the processor's cache together).
SCALED_BLOCK_VALUES = 1 << 16


def scaled_add_and_moments(post, rows, probabilities=None, log_table=None, items=None, categories=None,
                           points=None, axis=None, *, moments: bool = True):
    """:func:`add_and_moments` for a posterior held as a scaled density (decision rules 3).

    Each row of ``post`` is the posterior density on the grid divided by its sum.  An
    answer multiplies the row by the answer's probability row
    ``probabilities[items[k], categories[k]]``; the moments of the product are read with
    its sum ``total`` (:func:`scaled_moments`), and the product divided by ``total`` (so
    that it sums to 1 again) is written back.  A product whose ``total`` is not finite or
    is below :data:`RESCUE_BELOW` (the row's mass where the answer is all but impossible)
    is made again from logarithms, for that row alone: ``log(row)`` plus the answer's row
    of ``log_table``, ``exp(x - max)``.  Rows without a scored answer (``items[k] < 0``)
    are read and divided by their sum as they are.  Without ``probabilities`` the rows are
    only read (their moments), not written.  The rows go through in blocks that fit in the
    processor's cache, as in :func:`add_and_moments`.

    Parameters
    ----------
    post : float array (B, G), changed in place
    rows : int array (R,)
        Distinct rows of ``post``.
    probabilities, log_table : float arrays (n, C, G), optional
        Probability (and log probability) of each item's categories on the grid; nothing
        is multiplied without them.
    items, categories : int arrays (R,), optional
    points : float array (G, K), axis : float array (P,)
        The grid and the grid of one dimension.

    Returns
    -------
    (mean (R, K), covariance (R, K, K)), or None without ``moments``
    """
    rows = np.asarray(rows, dtype=np.int64)
    r_n = rows.size
    k = 0 if points is None else points.shape[1]
    mean = np.empty((r_n, k))
    cov = np.empty((r_n, k, k))
    if r_n == 0:
        return (mean, cov) if moments else None
    step = max(1, SCALED_BLOCK_VALUES // max(1, post.shape[-1]))
    consecutive = consecutive_rows(rows)
    adding = probabilities is not None
    every = adding and bool(np.all(items >= 0))
    if adding:
        by_answer = probabilities.reshape(-1, probabilities.shape[-1])  # row c + C * item
        answer_row = np.where(items >= 0, items, 0) * probabilities.shape[1] + categories
        buffer = np.empty((min(step, r_n), post.shape[-1]))
    # on a square grid the marginal sums of every block are kept, the moments read once
    square = moments and _on_square_grid(post, points, axis)
    if square:
        p = axis.shape[0]
        u, t, v = np.empty((r_n, p)), np.empty((r_n, p)), np.empty((r_n, p))
        total = np.empty(r_n)

    def read(values, at):
        if square:
            u[at], t[at], v[at] = _marginal_sums(values, axis)
            total[at] = np.einsum("ri->r", u[at])
            return total[at]
        if moments:
            mean[at], cov[at], sums = scaled_moments(values, points, axis)
            return sums
        return np.add.reduce(values, axis=1)

    for i in range(0, r_n, step):
        j = min(i + step, r_n)
        block = post[rows[i] : rows[i] + (j - i)] if consecutive else post[rows[i:j]]
        if not adding:
            read(block, slice(i, j))
            continue
        product = buffer[: j - i]
        if every:
            scored = None
            np.take(by_answer, answer_row[i:j], axis=0, out=product, mode="clip")
            product *= block
        else:
            scored = np.flatnonzero(items[i:j] >= 0)
            product[:] = block
            product[scored] *= by_answer[answer_row[i:j][scored]]
        sums = read(product, slice(i, j))
        low = ~(sums >= RESCUE_BELOW) | ~np.isfinite(sums)
        if low.any():
            redone = _rescue(product, block, low, scored, log_table, items[i:j], categories[i:j])
            sums[redone] = read(product[redone], i + redone)
        np.multiply(product, (1.0 / sums)[:, None], out=block)
        if not consecutive:
            post[rows[i:j]] = block
    if square:
        mean[:], cov[:] = _moments_of_marginals(u, t, v, total, axis)
    return (mean, cov) if moments else None


def _rescue(product, block, low, scored, log_table, items, categories) -> np.ndarray:
    """Make rows ``low`` of ``product`` again from logarithms: the row before the answer
    (``block``) as ``log``, plus the answer's log-probability row, ``exp(x - max)``; rows
    that took no scored answer are left as they are.  Returns the rows redone."""
    if scored is not None:
        took = np.zeros(low.shape, dtype=bool)
        took[scored] = True
        low = low & took
    redone = np.flatnonzero(low)
    for r in redone:
        with np.errstate(divide="ignore"):
            x = np.log(block[r]) + log_table[items[r], categories[r]]
        x -= np.max(x)
        np.exp(x, out=product[r])
    return redone


@attrs.define(eq=False)
class MultidimensionalState(KernelState):
    """:class:`KernelState` with an ability vector.

    ``theta`` and ``se`` are (B, K), ``prior_mean`` (B, K), ``prior_sd`` (B, K) the square
    roots of the prior variances; ``log_post`` (B, G) lives on the product grid.

    Attributes
    ----------
    covariance : float (B, K, K)
        Covariance of the interim estimate (posterior covariance for EAP, the inverse of
        prior precision plus test information at the mode for MAP).
    prior_covariance : float (B, K, K)
    """

    covariance: np.ndarray = None
    prior_covariance: np.ndarray = None

    @classmethod
    def empty_vector(cls, ctx, keys, *, grid: bool = True) -> "MultidimensionalState":
        """A batch of ``keys`` before the prior is set; without ``grid`` the rows carry no
        grid posterior (``log_post`` is (B, 0): a version-3 design that never reads it)."""
        tab = ctx.multidimensional
        base = KernelState.empty(ctx, keys, 0.0, 1.0)
        b, k = base.size, tab.k
        fields = {f.name: getattr(base, f.name) for f in attrs.fields(KernelState)}
        fields.update(
            prior_mean=np.broadcast_to(tab.prior_mean, (b, k)).copy(),
            prior_sd=np.broadcast_to(np.sqrt(np.diag(tab.prior_covariance)), (b, k)).copy(),
            theta=np.zeros((b, k)), se=np.zeros((b, k)),
            log_post=np.zeros((b, tab.points.shape[0] if grid else 0)),
        )
        return cls(**fields, covariance=np.broadcast_to(tab.prior_covariance, (b, k, k)).copy(),
                   prior_covariance=np.broadcast_to(tab.prior_covariance, (b, k, k)).copy())

    def to_dict(self, row: int = 0) -> dict:
        """JSON-ready snapshot of one examinee (ability persisted as a list)."""
        n = int(self.n_given[row])
        return {
            "key": int(self.keys[row]),
            "prior": [[float(x) for x in self.prior_mean[row]],
                      [[float(x) for x in r] for r in self.prior_covariance[row]]],
            "items": [int(x) for x in self.items[row, :n]],
            "responses": [int(x) for x in self.responses[row, :n]],
            "scored": [bool(x) for x in self.scored[row, :n]],
            "theta": [float(x) for x in self.theta[row]],
            "se": [float(x) for x in self.se[row]],
            "covariance": [[float(x) for x in r] for r in self.covariance[row]],
            "pending": int(self.pending[row]),
            "done": bool(self.done[row]),
            "stop_reason": str(self.stop_reason[row]),
            "elapsed": None if np.isnan(self.elapsed[row]) else float(self.elapsed[row]),
        }
