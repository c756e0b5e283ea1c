"""Ability estimation (MLE, MAP, EAP, WLE) for a batch of examinees on any mix of models.

Responses come as padded arrays, as :meth:`ResponseTable.to_padded` makes them:
``items (P, L)`` holds bank rows and ``responses (P, L)`` the observed categories, both
padded with -1 (an item with response -1 counts as not answered).

Row independence
----------------
Every examinee (row) is computed on its own: elementwise numpy, sums over a row's answers
taken one column at a time in a fixed order, and iterative methods freeze a row as soon as
it converges.  So scoring one examinee alone gives bit-for-bit the result of scoring them
inside a batch of any size, with any padding width and any chunking -- the live session and
the simulation rely on this to replay each other exactly.  EAP grids depend only on a
row's own prior and own answered items (or on the ``grid`` passed in), never on the other
rows.

Status strings
--------------
Every estimate is a finite number with a finite standard error; the status says what
happened (:data:`STATUSES`):

``"no_responses"``
    Nothing answered: every method reports the prior mean and prior SD (MLE and WLE have
    no likelihood to maximise; the prior is what is known).
``"all_lowest"`` / ``"all_highest"``
    Every answer is in its item's lowest / highest category.  The value follows the method:
    the likelihood of such a pattern keeps rising towards -inf / +inf, so the MLE returns the
    lower / upper bound of ``bounds`` with the standard error at that bound; MAP, EAP and WLE
    are finite (WLE for 2PL/GRM/GPCM items; with a lower asymptote c > 0 it may still reach
    a bound).
``"converged"``, ``"at_lower_bound"``, ``"at_upper_bound"``, ``"not_converged"``
    Outcome for any other pattern (EAP: ``"converged"``).  An MLE of a mixed
    pattern can legitimately sit at a bound when asymptotes c > 0 or d < 1 flatten the
    likelihood: it is found from the likelihood, never from the model names.
``"no_information"`` (MLE, WLE)
    A mixed pattern whose solution is interior but where the answered items carry no usable
    information (``1 / sqrt(I)`` beyond the width of ``bounds``): the likelihood is flat,
    e.g. right on an item far above and wrong on one far below, so the value is arbitrary.
``"prior_dominated"`` (MAP, EAP)
    The answers moved neither the estimate nor its standard error by more than
    :data:`PRIOR_DOMINATED_SHARE` of the prior SD: the result is the prior's.

Standard errors are capped at the width of ``bounds`` (``hi - lo``; for EAP the posterior SD
never comes near it): where the items carry (next to) no information at the estimate,
``1 / sqrt(I)`` runs to astronomical values or infinity, which beyond the width of the
ability range only says "anywhere in the range" -- the cap says the same with a number
(:func:`capped_standard_error`).  So "the standard error at the bound" is
``min(1 / sqrt(I(bound)), hi - lo)``.

Steep items far from theta make category probabilities underflow; the Newton steps then
take ``d log P / d theta`` from closed forms (:func:`adaptive_engine.models.log_derivatives`)
instead of ``P' / P``, so the estimates keep moving where the likelihood still rises.
"""

from __future__ import annotations

from typing import NamedTuple

import attrs
import numpy as np

from ..errors import AdaptiveEngineError, Problem, ResponseDataError
from . import models
from . import posterior as ability

METHODS = ("mle", "map", "eap", "wle")
#: Rows per block: bounds memory at a few (rows x grid points) arrays; results do not
#: depend on it.
DEFAULT_CHUNK_SIZE = 2_000
#: Coarsest step of the default EAP grid; each row refines it for its own test (see
#: :func:`grid_refinement`): 0.05 is enough for posterior SDs down to about 0.125.
GRID_STEP = 0.05
_TOLERANCE = 1e-10
#: Below this probability of the observed category, P'/P is taken from the closed-form log
#: derivatives (:func:`adaptive_engine.models.log_derivatives`) rather than by division.
_TINY_PROBABILITY = 1e-280
_MAX_ITERATIONS = 200

CONVERGED = "converged"
NO_RESPONSES = "no_responses"
ALL_LOWEST = "all_lowest"
ALL_HIGHEST = "all_highest"
AT_LOWER_BOUND = "at_lower_bound"
AT_UPPER_BOUND = "at_upper_bound"
NOT_CONVERGED = "not_converged"
NO_INFORMATION = "no_information"
PRIOR_DOMINATED = "prior_dominated"
#: Every status an estimate can have (see the module docstring).
STATUSES = (CONVERGED, NO_RESPONSES, ALL_LOWEST, ALL_HIGHEST, AT_LOWER_BOUND, AT_UPPER_BOUND,
            NOT_CONVERGED, NO_INFORMATION, PRIOR_DOMINATED)
_SOLVER_STATUS = np.array([CONVERGED, AT_LOWER_BOUND, AT_UPPER_BOUND, NOT_CONVERGED, NO_INFORMATION], dtype=object)
#: MAP and EAP estimates within this share of the prior SD of the prior mean, with an SE
#: within the same share of the prior SD, are ``prior_dominated``.
PRIOR_DOMINATED_SHARE = 0.01


def _readonly(dtype):
    def convert(x):
        arr = np.array(x, dtype=dtype).reshape(-1)
        arr.setflags(write=False)
        return arr

    return convert


def _same_length(instance, attribute, value):
    if value.shape != instance.theta.shape:
        raise AdaptiveEngineError(
            f"{attribute.name} has {value.shape[0]} entries, theta has {instance.theta.shape[0]}",
            location=f"AbilityEstimates.{attribute.name}",
        )


@attrs.frozen(eq=False)
class AbilityEstimates:
    """Ability estimates of a batch of examinees.

    Attributes
    ----------
    theta : float array, shape (P,)
    se : float array, shape (P,)
        Standard error (MLE, WLE: ``1/sqrt(test information)``; MAP: from the posterior
        curvature; EAP: posterior SD).
    n_items : int array, shape (P,)
        Number of answered items.
    method : str
        ``"mle"``, ``"map"``, ``"eap"`` or ``"wle"``.
    status : object array of str, shape (P,)
        See the module docstring.
    """

    theta: np.ndarray = attrs.field(converter=_readonly(float))
    se: np.ndarray = attrs.field(converter=_readonly(float), validator=_same_length)
    n_items: np.ndarray = attrs.field(converter=_readonly(np.int64), validator=_same_length)
    method: str = attrs.field(validator=attrs.validators.in_(METHODS))
    status: np.ndarray = attrs.field(converter=_readonly(object), validator=_same_length)

    def __len__(self) -> int:
        return int(self.theta.shape[0])

    def to_records(self, person_ids=None) -> list[dict]:
        """One dict per examinee: ``person_id`` (when given), theta, se, n_items, status."""
        ids = range(len(self)) if person_ids is None else person_ids
        return [
            {"person_id": str(pid) if person_ids is not None else int(pid),
             "theta": float(t), "se": float(s), "n_items": int(n), "status": str(st)}
            for pid, t, s, n, st in zip(ids, self.theta, self.se, self.n_items, self.status)
        ]


# ----------------------------------------------------------------------------------------
# input checks


class _Data(NamedTuple):
    source: object  # ItemBank or ItemParameters
    params: models.ItemParameters
    items: np.ndarray  # (P, L) bank rows, 0 where not answered (its terms are masked out)
    responses: np.ndarray  # (P, L) categories, -1 where not answered
    answered: np.ndarray  # (P, L) bool
    n_items: np.ndarray  # (P,)
    pattern_status: np.ndarray  # (P,) object: "", no_responses, all_lowest, all_highest


def _params_of(bank_or_params) -> models.ItemParameters:
    if isinstance(bank_or_params, models.ItemParameters):
        return bank_or_params
    params = getattr(bank_or_params, "params", None)
    if not isinstance(params, models.ItemParameters):
        raise AdaptiveEngineError("expected an ItemBank or ItemParameters", location="bank")
    return params


def integer_array(x, name) -> np.ndarray:
    arr = np.asarray(x)
    if arr.ndim == 1:
        arr = arr[None, :]
    if arr.ndim != 2:
        raise ResponseDataError(f"{name} must be a (persons, answers) array, got shape {arr.shape}",
                                location=name)
    if arr.dtype.kind in "iu" or arr.size == 0:
        return arr.astype(np.int64)
    if arr.dtype.kind == "f" and np.all(np.isfinite(arr)) and np.all(arr == np.round(arr)):
        return arr.astype(np.int64)
    raise ResponseDataError(f"{name} must hold whole numbers (dtype {arr.dtype})", location=name)


def located(mask, name, message) -> list[Problem]:
    rows, cols = np.nonzero(mask)
    return [Problem(f"{name}[{r}, {c}]", message) for r, c in zip(rows[:20], cols[:20])]


def _prepare(bank_or_params, items, responses) -> _Data:
    params = _params_of(bank_or_params)
    safe_items, resp, answered, n_items, pattern = checked_answers(items, responses, params.a.shape[0],
                                                                   params.n_categories)
    return _Data(bank_or_params, params, safe_items, resp, answered, n_items, pattern)


def checked_answers(items, responses, n_bank: int, n_categories: np.ndarray):
    """Check padded answers against a bank and describe each row (shared by every scoring).

    ``items`` and ``responses`` are (P, L) whole numbers, -1 where not answered; the bank
    has ``n_bank`` items with ``n_categories`` (n,) categories each.  Raises
    :class:`ResponseDataError` with located problems.  Returns ``safe_items`` (0 where not
    answered), ``responses`` (-1 where not answered), ``answered`` (bool), ``n_items`` per
    row and the row's pattern status ("", ``no_responses``, ``all_lowest``, ``all_highest``).
    """
    items = integer_array(items, "items")
    responses = integer_array(responses, "responses")
    if items.shape != responses.shape:
        raise ResponseDataError(
            f"items {items.shape} and responses {responses.shape} differ in shape", location="responses"
        )
    problems = located(items < -1, "items", "item index below -1 (use -1 for padding)")
    problems += located(items >= n_bank, "items", f"item index beyond the bank's {n_bank} items")
    problems += located(responses < -1, "responses", "response below -1 (use -1 for not answered)")
    problems += located((items == -1) & (responses >= 0), "responses", "a response without an item")
    if problems:
        raise ResponseDataError(problems)
    answered = (items >= 0) & (responses >= 0)
    safe_items = np.where(answered, items, 0)
    n_cat = n_categories[safe_items]
    problems = [
        Problem(f"responses[{r}, {c}]",
                f"response {int(responses[r, c])} is outside the categories 0..{int(n_cat[r, c]) - 1} "
                f"of item row {int(items[r, c])}")
        for r, c in zip(*np.nonzero(answered & (responses >= n_cat)))
    ][:20]
    if problems:
        raise ResponseDataError(problems)
    resp = np.where(answered, responses, -1)
    n_items = answered.sum(axis=1)
    lowest = np.all(~answered | (resp == 0), axis=1)
    highest = np.all(~answered | (resp == n_cat - 1), axis=1)
    pattern = np.full(items.shape[0], "", dtype=object)
    pattern[highest] = ALL_HIGHEST
    pattern[lowest] = ALL_LOWEST
    pattern[n_items == 0] = NO_RESPONSES
    return safe_items, resp, answered, n_items, pattern


def _per_person(value, n, name) -> np.ndarray:
    arr = np.asarray(value, dtype=float)
    if arr.ndim == 0:
        arr = np.full(n, float(arr))
    if arr.shape != (n,):
        raise AdaptiveEngineError(f"{name} must be a number or one value per person ({n}), "
                                  f"got shape {arr.shape}", location=name)
    if not np.all(np.isfinite(arr)):
        raise AdaptiveEngineError(f"{name} must be finite", location=name)
    return arr


def _priors(prior_mean, prior_sd, n):
    mean = _per_person(prior_mean, n, "prior_mean")
    sd = _per_person(prior_sd, n, "prior_sd")
    if np.any(sd <= 0):
        raise AdaptiveEngineError("prior_sd must be > 0", location="prior_sd")
    return mean, sd


def _check_bounds(bounds):
    lo, hi = (float(x) for x in bounds)
    if not (np.isfinite(lo) and np.isfinite(hi) and lo < hi):
        raise AdaptiveEngineError(f"bounds must be two finite numbers lo < hi, got {bounds!r}",
                                  location="bounds")
    return lo, hi


def row_sum(x) -> np.ndarray:
    """Sum over the last axis one column at a time.

    A fixed left-to-right order makes each row's sum independent of the padding width
    (numpy's pairwise summation regroups terms when the row length changes).
    """
    out = np.array(x[..., 0], dtype=float, copy=True) if x.shape[-1] else np.zeros(x.shape[:-1])
    for j in range(1, x.shape[-1]):
        out += x[..., j]
    return out


def _chunks(n, size):
    size = max(1, int(size))
    return [slice(s, min(s + size, n)) for s in range(0, n, size)]


# ----------------------------------------------------------------------------------------
# EAP


def default_grid(mean: float = 0.0, sd: float = 1.0, step: float = GRID_STEP) -> np.ndarray:
    """Default EAP grid for one prior: covers [-6, 6] and mean +- 7 SD, ends on whole numbers.

    Whole-number ends mean that examinees with similar priors share one grid, and the grid
    of a row never depends on the other rows of a batch.  This is the coarsest default
    grid (``step = GRID_STEP``); :func:`eap` refines the step per row for long tests of
    steep items (:func:`grid_refinement`).
    """
    lo = min(-6.0, float(np.floor(mean - 7.0 * sd)))
    hi = max(6.0, float(np.ceil(mean + 7.0 * sd)))
    n = int(round((hi - lo) / step)) + 1
    return np.linspace(lo, hi, n)


def max_information_bound(params: models.ItemParameters) -> np.ndarray:
    """An upper bound on each item's maximum Fisher information over theta, shape (n,).

    Closed forms, so that no grid can miss the peak of a steep item:

    * dichotomous: ``(D a)^2 / 4``, the 2PL maximum (reached at theta = b); asymptotes
      c > 0 or d < 1 only lower the peak (Lord 1980 for the 3PL; Magis 2013 for the 4PL);
    * GRM: ``(D a)^2``: the score ``d log P_k / d theta = D a (1 - P*_k - P*_{k+1})`` lies
      in [-D a, D a] (Samejima 1969), and the information is its mean square;
    * GPCM: ``(D a)^2 K^2 / 4``: the information is ``(D a)^2 Var(X)`` (Muraki 1992), and a
      score on 0..K has variance at most ``K^2 / 4``.
    """
    slope2 = (params.scaling * params.a) ** 2
    k = params.n_categories - 1
    return np.where(params.family == models.DICHOTOMOUS, slope2 / 4.0,
                    np.where(params.family == models.GRADED, slope2, slope2 * k * k / 4.0))


#: Finest default grid step is GRID_STEP / MAX_REFINEMENT (bounds the grid and table size).
MAX_REFINEMENT = 50
#: The default step is at most this fraction of the lower bound on a row's posterior SD.
STEPS_PER_SD = 2.5


def _cached_bound(source, params) -> np.ndarray:
    cached = getattr(source, "cached", None)
    if cached is None:
        return max_information_bound(params)
    return cached("estimation.max_information_bound", lambda: max_information_bound(params))


def grid_refinement(params: models.ItemParameters, items, answered, prior_sd, *,
                    bound=None) -> np.ndarray:
    """Per row, the integer k such that the default EAP grid step is ``GRID_STEP / k``.

    The rectangle rule on a grid of step h integrates a smooth posterior of SD s with a
    relative error of order ``exp(-2 pi^2 s^2 / h^2)``, so h must shrink with s.  A lower
    bound on s comes from the row's own items: the log posterior is never more curved than
    ``sum_i max I_i + 1 / prior_sd^2`` (for the 2PL exactly so; :func:`max_information_bound`
    gives the per-item bound), so ``s >= 1 / sqrt(that sum)`` (the Cramer-Rao bound applied
    to the posterior, in the spirit of Bock & Mislevy 1982's quadrature).  k is the smallest
    integer with ``GRID_STEP / k <= s / STEPS_PER_SD``; 1 (step 0.05) for ordinary tests,
    larger for long tests of steep items, at most :data:`MAX_REFINEMENT`.

    Parameters
    ----------
    params : ItemParameters
    items, answered : arrays, shape (P, L)
    prior_sd : array, shape (P,)
    bound : array, shape (n,), optional
        :func:`max_information_bound` of ``params``, when the caller has it at hand.

    Returns
    -------
    int array, shape (P,)
        Depends on each row alone (its answered items and its prior).
    """
    bound = max_information_bound(params) if bound is None else bound
    precision = row_sum(np.where(answered, bound[items], 0.0)) + 1.0 / prior_sd**2
    sd_floor = 1.0 / np.sqrt(precision)
    k = np.ceil(GRID_STEP * STEPS_PER_SD / sd_floor - 1e-9)
    return np.clip(k, 1, MAX_REFINEMENT).astype(np.int64)


def _grid_groups(mean, sd, grid, data: _Data | None = None):
    """(grid, rows) pairs: one grid for all rows when given, else one per distinct default.

    A default grid covers [-6, 6] and the row's prior mean +- 7 SD, ends on whole numbers,
    and has step ``GRID_STEP / k`` with k from :func:`grid_refinement`; rows that share
    all three share one grid, and no row's grid depends on the other rows.
    """
    if grid is not None:
        grid = np.asarray(grid, dtype=float)
        if grid.ndim != 1 or grid.size < 2 or not np.all(np.diff(grid) > 0):
            raise AdaptiveEngineError("grid must be an increasing 1-D array of ability points",
                                      location="grid")
        return [(grid, np.arange(mean.size))]
    lo = np.minimum(-6.0, np.floor(mean - 7.0 * sd))
    hi = np.maximum(6.0, np.ceil(mean + 7.0 * sd))
    if data is None:
        refine = np.ones(mean.size)
    else:
        refine = grid_refinement(data.params, data.items, data.answered, sd,
                                 bound=_cached_bound(data.source, data.params))
    keys = np.stack([lo, hi, refine.astype(float)], axis=1)
    if mean.size and np.all(keys == keys[0]):  # the common case: skip the row sort
        unique, inverse = keys[:1], np.zeros(mean.size, dtype=np.int64)
    else:
        unique, inverse = np.unique(keys, axis=0, return_inverse=True)
    inverse = inverse.reshape(-1)
    groups = []
    for g, (glo, ghi, k) in enumerate(unique):
        # for k = 1 exactly the points of default_grid(), as before
        n = int(round((ghi - glo) * k / GRID_STEP)) + 1
        groups.append((np.linspace(glo, ghi, n), np.flatnonzero(inverse == g)))
    return groups


def _flat_log_table(source, grid) -> np.ndarray:
    """Log probabilities as rows ``item * C + category`` of length G, shape (n * C, G)."""
    def make():
        if isinstance(source, models.ItemParameters):
            table = models.log_probabilities(*models.outer(source, grid))
        else:
            table = source.log_probability_table(grid)
        n, g, c = table.shape
        # categories an item lacks are never looked up; 0 keeps the table finite
        flat = np.ascontiguousarray(np.where(np.isfinite(table), table, 0.0).transpose(0, 2, 1)).reshape(n * c, g)
        flat.setflags(write=False)
        return flat

    cached = getattr(source, "cached", None)
    if cached is None:
        return make()
    return cached(("estimation.flat_log_table", np.asarray(grid).tobytes()), make)


def _grid_log_likelihood(table, lookup, answered) -> np.ndarray:
    """Log-likelihood of each row's answers on the grid, shape (B, G).

    A sparse (rows x table rows) selection matrix times the table: for every row, scipy
    adds that row's table rows in the order of its answers, so a row's sum does not
    depend on the other rows or on padding (padding is simply not stored).
    """
    from scipy import sparse  # imported on first use: EAP scoring in the kernel needs no scipy

    counts = answered.sum(axis=1)
    indptr = np.concatenate([[0], np.cumsum(counts)])
    indices = lookup[answered]  # row-major: each row's answers in their column order
    select = sparse.csr_array((np.ones(indices.size), indices, indptr),
                              shape=(lookup.shape[0], table.shape[0]))
    return np.asarray(select @ table)


def _posterior_moments(log_post, grid):
    """Posterior mean and SD of each row of ``log_post`` (B, G) on ``grid`` (G,)."""
    log_post = np.ascontiguousarray(log_post)
    w = np.exp(log_post - log_post.max(axis=-1, keepdims=True))
    w /= np.sum(w, axis=-1, keepdims=True)
    mean = np.sum(w * grid, axis=-1)
    var = np.sum(w * (grid - mean[:, None]) ** 2, axis=-1)
    return mean, np.maximum(np.sqrt(np.maximum(var, 0.0)), ability.resolution_floor(grid))


def _grid_pass(data: _Data, mean, sd, grid, chunk_size, bounds=None):
    """EAP, posterior SD and grid maximisers of the likelihood and the posterior.

    Returns
    -------
    eap, posterior_sd, likelihood_argmax, posterior_argmax : arrays, shape (P,)
        The argmax values only consider grid points within ``bounds`` (when given).
    """
    n_persons = data.items.shape[0]
    out = np.empty((4, n_persons))
    n_cat = data.params.max_categories
    for grid_g, rows in _grid_groups(mean, sd, grid, data):
        table = _flat_log_table(data.source, grid_g)
        outside = np.zeros(grid_g.size, dtype=bool)
        if bounds is not None:
            outside = (grid_g < bounds[0]) | (grid_g > bounds[1])
            if outside.all():  # bounds narrower than the grid spacing
                outside[:] = False
        for part in _chunks(rows.size, chunk_size):
            r = rows[part]
            answered = data.answered[r]
            lookup = np.where(answered, data.items[r] * n_cat + data.responses[r], 0)
            log_lik = _grid_log_likelihood(table, lookup, answered)
            log_post = log_lik + ability.normal_log_prior(grid_g, mean[r], sd[r])
            out[0, r], out[1, r] = _posterior_moments(log_post, grid_g)
            if bounds is not None:
                log_lik[:, outside] = -np.inf
                log_post[:, outside] = -np.inf
                out[2, r] = grid_g[np.argmax(log_lik, axis=1)]
                out[3, r] = grid_g[np.argmax(log_post, axis=1)]
    return out[0], out[1], out[2], out[3]


def eap_status(bank_or_params, items, responses, theta, se, *, prior_mean=0.0, prior_sd=1.0) -> np.ndarray:
    """Status of EAP estimates computed elsewhere (the kernel's running posterior), (P,).

    The statuses :func:`eap` gives: ``no_responses``, ``prior_dominated``, ``all_lowest``,
    ``all_highest`` or ``converged``.
    """
    data = _prepare(bank_or_params, items, responses)
    mean, sd = _priors(prior_mean, prior_sd, data.items.shape[0])
    status = np.where(data.pattern_status == "", CONVERGED, data.pattern_status)
    return _mark_prior_dominated(status, np.asarray(theta, dtype=float), np.asarray(se, dtype=float),
                                 mean, sd, data.n_items)


def _eap_arrays(data: _Data, mean, sd, grid, chunk_size):
    theta, se, _, _ = _grid_pass(data, mean, sd, grid, chunk_size)
    return theta, se


def eap(bank_or_params, items, responses, *, prior_mean=0.0, prior_sd=1.0, grid=None,
        chunk_size: int = DEFAULT_CHUNK_SIZE) -> AbilityEstimates:
    """Expected a posteriori ability (Bock & Mislevy 1982) by quadrature on a grid.

    The posterior under a normal prior is evaluated on ``grid``; the estimate is the
    posterior mean and the standard error the posterior SD.  The default grid is made per
    row: :func:`default_grid` of the row's prior (-7..7 for N(0, 1)) with step
    ``0.05 / k``, k from :func:`grid_refinement`, so that the step stays below about 1/2.5
    of a lower bound on the row's posterior SD (k = 1, step 0.05, for ordinary tests; finer
    for long tests of steep items, whose posterior SD can fall to 0.02).  Log probabilities come from the bank's
    cached (items x grid x categories) table and are summed per row by a sparse selection
    product, in blocks of ``chunk_size`` rows, so memory stays at O(chunk_size x G).

    Parameters
    ----------
    bank_or_params : ItemBank or ItemParameters
    items, responses : int arrays, shape (P, L)
        Bank rows and observed categories, -1 as padding.
    prior_mean, prior_sd : float or array, shape (P,)
    grid : array, shape (G,), optional
        One grid for every row instead of the per-row default (the caller then answers
        for its step).
    chunk_size : int

    Returns
    -------
    AbilityEstimates
    """
    data = _prepare(bank_or_params, items, responses)
    mean, sd = _priors(prior_mean, prior_sd, data.items.shape[0])
    theta, se = _eap_arrays(data, mean, sd, grid, chunk_size)
    status = np.where(data.pattern_status == "", CONVERGED, data.pattern_status)
    status = _mark_prior_dominated(status, theta, se, mean, sd, data.n_items)
    return AbilityEstimates(theta=theta, se=se, n_items=data.n_items, method="eap", status=status)


# ----------------------------------------------------------------------------------------
# Newton-type estimators


def _safe_ratio(num, den):
    return np.divide(num, den, out=np.zeros_like(num), where=den > 1e-300)


class _Sums(NamedTuple):
    gradient: np.ndarray  # sum of d log P(x) / d theta
    observed: np.ndarray  # sum of d2 log P(x) / d theta2 (observed curvature)
    information: np.ndarray  # test information sum_i sum_k P'^2 / P
    warm_j: np.ndarray  # Warm's J = sum_i sum_k P' P'' / P


def _derivative_sums(params, items, responses, theta) -> _Sums:
    """Row sums over answered items at ``theta`` (B,); ``items``, ``responses`` (B, L)."""
    if items.shape[-1] == 0:
        zero = np.zeros(items.shape[0])
        return _Sums(zero, zero, zero, zero)
    p, dp, d2p = models.derivatives(params.take(items), theta[:, None], second=True)
    answered = responses >= 0
    idx = np.where(answered, responses, 0)[..., None]
    p_x = np.take_along_axis(p, idx, axis=-1)[..., 0]
    dp_x = np.take_along_axis(dp, idx, axis=-1)[..., 0]
    d2p_x = np.take_along_axis(d2p, idx, axis=-1)[..., 0]
    ratio = _safe_ratio(dp_x, p_x)
    observed = _safe_ratio(d2p_x, p_x) - ratio**2
    tiny = answered & ~(p_x > _TINY_PROBABILITY)
    if tiny.any():
        # a steep item far from theta: its observed category's probability has (nearly)
        # underflowed and P'/P is 0/0 -- take the log derivatives from their closed forms
        # instead, or the estimate stalls where the likelihood is still rising
        r, r2 = models.log_derivatives(params.take(items[tiny]), theta[np.nonzero(tiny)[0]])
        k = idx[tiny]
        ratio[tiny] = np.take_along_axis(r, k, axis=-1)[:, 0]
        observed[tiny] = np.take_along_axis(r2, k, axis=-1)[:, 0]
    info = _safe_ratio(dp**2, p).sum(axis=-1)
    warm_j = _safe_ratio(dp * d2p, p).sum(axis=-1)
    return _Sums(*(row_sum(np.where(answered, x, 0.0)) for x in (ratio, observed, info, warm_j)))


def _fisher_or_observed(s: _Sums):
    """Newton slope of the log-likelihood: the observed curvature where it is negative,
    else minus the information (Fisher scoring), so every step goes uphill."""
    return np.where(s.observed < 0, s.observed, -s.information)


def _estimating_function(method, sums: _Sums, theta, mean, sd):
    """(g, slope): the equation g(theta) = 0 solved by each method and a negative slope."""
    slope = _fisher_or_observed(sums)
    if method == "mle":
        return sums.gradient, slope
    if method == "map":
        return sums.gradient - (theta - mean) / sd**2, slope - 1.0 / sd**2
    # wle: Warm (1989), eq. for the weighted likelihood: l'(theta) + J / (2 I) = 0
    return sums.gradient + _safe_ratio(sums.warm_j, 2.0 * sums.information), slope


def _solve(evaluate, start, lo, hi):
    """Per-row root of a function g that is positive below and negative above its root.

    From ``start`` the solver walks uphill (towards the sign of g) in steps of 0.25 up to
    1 away from the start, then 0.5, until g changes sign, which brackets the nearest root
    in that direction; if g keeps its sign all the way to the bound, the answer is that
    bound.  Short steps matter: with asymptotes c > 0 a likelihood can rise again towards
    a bound after an interior peak, and a long step could jump over that peak.  Inside the
    bracket it takes Newton steps; a step that would leave the bracket, or that does not at
    least halve the step before last, is replaced by halving the bracket (so every row
    converges), and the bracket shrinks with each evaluation.  Rows freeze once converged.

    Parameters
    ----------
    evaluate : callable (rows, theta) -> (g, slope)
    start : array, shape (B,)

    Returns
    -------
    theta : array, shape (B,)
    code : int array, shape (B,)  (index into ``_SOLVER_STATUS``)
    """
    n = start.shape[0]
    x = np.clip(start, lo, hi).astype(float)
    g, s = evaluate(np.arange(n), x)
    direction = np.sign(g)
    code = np.zeros(n, dtype=np.int64)
    # near: last point where g still has the starting sign; far: first point past the root
    near, g_near, s_near = x.copy(), g.copy(), s.copy()
    far, g_far, s_far = x.copy(), g.copy(), s.copy()
    searching = direction != 0
    offset = 0.25
    while searching.any():
        rows = np.flatnonzero(searching)
        dr = direction[rows]
        trial = np.clip(x[rows] + dr * offset, lo, hi)
        g_t, s_t = evaluate(rows, trial)
        flipped = dr * g_t <= 0
        keep = ~flipped
        near[rows[keep]], g_near[rows[keep]], s_near[rows[keep]] = trial[keep], g_t[keep], s_t[keep]
        far[rows[flipped]], g_far[rows[flipped]], s_far[rows[flipped]] = trial[flipped], g_t[flipped], s_t[flipped]
        bound = np.where(dr > 0, hi, lo)
        at_bound = keep & (trial == bound)
        code[rows[at_bound]] = np.where(dr[at_bound] > 0, 2, 1)
        searching[rows[flipped | at_bound]] = False
        offset += 0.25 if offset < 1.0 else 0.5
    bracketed = (code == 0) & (direction != 0)
    exact = bracketed & (g_far == 0)
    # Newton starts from the end of the bracket where |g| is smaller
    use_far = np.abs(g_far) < np.abs(g_near)
    x = np.where(code == 1, lo, np.where(code == 2, hi, np.where(bracketed & use_far, far, near)))
    x = np.where(exact, far, x)
    g = np.where(use_far, g_far, g_near)
    s = np.where(use_far, s_far, s_near)
    up = direction > 0
    a = np.where(up, near, far)  # g(a) > 0
    b = np.where(up, far, near)  # g(b) < 0
    active = bracketed & ~exact
    step = b - a
    step_before = step.copy()
    with np.errstate(divide="ignore", invalid="ignore"):
        for _ in range(_MAX_ITERATIONS):
            rows = np.flatnonzero(active)
            if rows.size == 0:
                break
            xr, gr, sr, ar, br = x[rows], g[rows], s[rows], a[rows], b[rows]
            newton = xr - gr / sr
            halve = ~((newton > ar) & (newton < br)) | (np.abs(2.0 * gr) > np.abs(step_before[rows] * sr))
            x_new = np.where(halve, 0.5 * (ar + br), newton)
            step_before[rows] = step[rows]
            step[rows] = x_new - xr
            g_new, s_new = evaluate(rows, x_new)
            x[rows], g[rows], s[rows] = x_new, g_new, s_new
            above = g_new > 0
            a[rows] = np.where(above, x_new, ar)
            b[rows] = np.where(above, br, x_new)
            done = (np.abs(step[rows]) < _TOLERANCE) | (g_new == 0) | (b[rows] - a[rows] < _TOLERANCE)
            active[rows[done]] = False
    code[active] = 3
    return x, code


def _newton_estimates(method, data: _Data, mean, sd, bounds, start, grid, chunk_size):
    lo, hi = _check_bounds(bounds)
    n_persons = data.items.shape[0]
    if start is None:
        # MLE and MAP start at the best grid point of their own objective (a global search:
        # 3PL likelihoods can have several peaks); WLE starts at the EAP.
        eap_theta, _, lik_max, post_max = _grid_pass(data, mean, sd, grid, chunk_size, (lo, hi))
        start = {"mle": lik_max, "map": post_max, "wle": eap_theta}[method]
    else:
        start = _per_person(start, n_persons, "start")
    theta = np.empty(n_persons)
    se = np.empty(n_persons)
    code = np.empty(n_persons, dtype=np.int64)
    for part in _chunks(n_persons, chunk_size):
        items, resp = data.items[part], data.responses[part]
        m, v = mean[part], sd[part]

        def evaluate(rows, x):
            sums = _derivative_sums(data.params, items[rows], resp[rows], x)
            return _estimating_function(method, sums, x, m[rows], v[rows])

        theta[part], code[part] = _solve(evaluate, start[part], lo, hi)
        final = _derivative_sums(data.params, items, resp, theta[part])
        # posterior curvature (MAP: observed second derivative of the log-likelihood minus
        # the prior's), or the test information (MLE, WLE)
        precision = -(final.observed - 1.0 / v**2) if method == "map" else final.information
        se[part] = capped_standard_error(precision, hi - lo)
        if method != "map":
            # an interior "optimum" of a likelihood with no information there is arbitrary
            no_information = (code[part] == 0) & ~(final.information * (hi - lo) ** 2 > 1.0)
            code[part] = np.where(no_information, 4, code[part])
    status = np.where(data.pattern_status == "", _SOLVER_STATUS[code], data.pattern_status)
    empty = data.n_items == 0
    if method in ("mle", "wle"):
        # no answer, no likelihood: report the prior, as MAP and EAP do, and say so
        theta[empty], se[empty] = np.clip(mean[empty], lo, hi), np.minimum(sd[empty], hi - lo)
    else:
        status = _mark_prior_dominated(status, theta, se, mean, sd, data.n_items)
    return AbilityEstimates(theta=theta, se=se, n_items=data.n_items, method=method, status=status)


def capped_standard_error(precision, width: float) -> np.ndarray:
    """``1 / sqrt(precision)``, never above ``width`` (the ability range), shape of ``precision``.

    Where the answered items carry (next to) no information at the estimate -- all answers
    right on easy items at the upper bound, steep items far away -- ``1 / sqrt(I)`` runs to
    astronomical values or infinity.  Beyond the width of the ability range such a value
    only says "anywhere in the range"; the cap says the same with a finite number, so that
    intervals, scaled scores and stopping rules stay arithmetic.
    """
    precision = np.asarray(precision, dtype=float)
    with np.errstate(divide="ignore", invalid="ignore"):
        raw = 1.0 / np.sqrt(precision)
    return np.where((precision > 0) & (raw < width), raw, float(width))


def _mark_prior_dominated(status, theta, se, mean, sd, n_items) -> np.ndarray:
    """``prior_dominated`` where answers moved neither the estimate nor its SE off the prior."""
    near = (np.abs(theta - mean) <= PRIOR_DOMINATED_SHARE * sd) & (np.abs(se - sd) <= PRIOR_DOMINATED_SHARE * sd)
    return np.where(near & (n_items > 0), PRIOR_DOMINATED, status)


_NEWTON_DOC = """
    Parameters
    ----------
    bank_or_params : ItemBank or ItemParameters
    items, responses : int arrays, shape (P, L)
        Bank rows and observed categories, -1 as padding.
    prior_mean, prior_sd : float or array, shape (P,)
        {prior}
    bounds : (float, float)
        The estimate is kept within [lo, hi].
    grid : array, shape (G,), optional
        Grid searched for start values (default: the per-row EAP grid, see :func:`eap`).
    start : float or array, shape (P,), optional
        Start values instead of the grid search.
    chunk_size : int
        Rows solved together (memory only; results do not depend on it).

    Returns
    -------
    AbilityEstimates
"""


def mle(bank_or_params, items, responses, *, prior_mean=0.0, prior_sd=1.0, bounds=(-6.0, 6.0),
        grid=None, start=None, chunk_size: int = DEFAULT_CHUNK_SIZE) -> AbilityEstimates:
    """Maximum-likelihood ability, bounded to ``bounds``.

    Solves ``d log L / d theta = 0`` by Newton-Raphson (Fisher scoring where the observed
    curvature is not negative, as with a lower asymptote c > 0), safeguarded by a sign
    bracket with step halving (see :func:`_solve`), started from the grid point of highest
    likelihood within ``bounds`` (the likelihood on the grid comes from the same cached table
    as the EAP; a start at the EAP could climb a minor peak of a 3PL likelihood).  The standard
    error is ``1 / sqrt(I(theta_hat))`` with I the test information (Lord 1980).

    An all-lowest (all-highest) pattern has no finite MLE: the likelihood keeps rising
    towards -inf (+inf), so the result is the lower (upper) bound with status
    ``"all_lowest"`` (``"all_highest"``) and the standard error at that bound.  A mixed
    pattern whose likelihood peaks at a bound gets ``"at_lower_bound"`` /
    ``"at_upper_bound"``.
    """
    data = _prepare(bank_or_params, items, responses)
    mean, sd = _priors(prior_mean, prior_sd, data.items.shape[0])
    return _newton_estimates("mle", data, mean, sd, bounds, start, grid, chunk_size)


def map_estimate(bank_or_params, items, responses, *, prior_mean=0.0, prior_sd=1.0,
                 bounds=(-6.0, 6.0), grid=None, start=None,
                 chunk_size: int = DEFAULT_CHUNK_SIZE) -> AbilityEstimates:
    """Maximum a posteriori (posterior mode) ability under a normal prior.

    Newton steps on the log posterior ``log L(theta) - (theta - mean)^2 / (2 sd^2)``, with
    the same safeguards as :func:`mle`, started from the grid point of highest posterior
    density within ``bounds``.  The standard error comes from the posterior
    curvature at the mode, ``1 / sqrt(-(l''(theta) - 1/sd^2))``, using the *observed*
    second derivative ``l''`` of the log-likelihood (not the expected information).
    """
    data = _prepare(bank_or_params, items, responses)
    mean, sd = _priors(prior_mean, prior_sd, data.items.shape[0])
    return _newton_estimates("map", data, mean, sd, bounds, start, grid, chunk_size)


def wle(bank_or_params, items, responses, *, prior_mean=0.0, prior_sd=1.0, bounds=(-6.0, 6.0),
        grid=None, start=None, chunk_size: int = DEFAULT_CHUNK_SIZE) -> AbilityEstimates:
    """Warm's (1989) weighted likelihood ability estimate.

    Solves ``l'(theta) + J(theta) / (2 I(theta)) = 0`` with I the test information and
    ``J = sum_i sum_k P'_ik P''_ik / P_ik``; works for dichotomous and polytomous items.
    Newton slope: the observed curvature of the log-likelihood (Fisher scoring where it is
    not negative), within the same bracket safeguard as :func:`mle`, started from the EAP
    (Warm's equation has no objective to search a grid with).  Standard error
    ``1 / sqrt(I(theta_hat))``.  The WLE of an all-lowest / all-highest pattern is finite
    for 2PL, GRM and GPCM items; the result always stays within ``bounds``.
    """
    data = _prepare(bank_or_params, items, responses)
    mean, sd = _priors(prior_mean, prior_sd, data.items.shape[0])
    return _newton_estimates("wle", data, mean, sd, bounds, start, grid, chunk_size)


mle.__doc__ += _NEWTON_DOC.format(prior="Only choose the default grid of the start search.")
map_estimate.__doc__ += _NEWTON_DOC.format(prior="The normal prior.")
wle.__doc__ += _NEWTON_DOC.format(prior="Only used for the EAP start values.")


def estimate(bank_or_params, items, responses, method: str, *, prior_mean=0.0, prior_sd=1.0,
             bounds=(-6.0, 6.0), grid=None, start=None,
             chunk_size: int = DEFAULT_CHUNK_SIZE) -> AbilityEstimates:
    """Ability estimates by ``method`` (``"mle"``, ``"map"``, ``"eap"`` or ``"wle"``).

    See :func:`mle`, :func:`map_estimate`, :func:`eap` and :func:`wle`; ``bounds`` and
    ``start`` do not apply to EAP.
    """
    if method not in METHODS:
        raise AdaptiveEngineError(f"unknown method {method!r} (use one of {', '.join(METHODS)})",
                                  location="method")
    if method == "eap":
        return eap(bank_or_params, items, responses, prior_mean=prior_mean, prior_sd=prior_sd,
                   grid=grid, chunk_size=chunk_size)
    func = {"mle": mle, "map": map_estimate, "wle": wle}[method]
    return func(bank_or_params, items, responses, prior_mean=prior_mean, prior_sd=prior_sd,
                bounds=bounds, grid=grid, start=start, chunk_size=chunk_size)


#: Ability bounds of :func:`score_responses` (MLE, MAP and WLE stay within them).
SCORE_BOUNDS = (-6.0, 6.0)
#: Prior SDs :func:`score_responses` accepts: from the coarsest default grid step to 4.
#: The default grid spans the prior mean +- 7 SD, so the bounds keep it within 57 logits
#: (a few times the usual 14) and a posterior of SD above the step resolvable.
SCORE_PRIOR_SD_RANGE = (GRID_STEP, 4.0)
#: Persons x answer slots scored at once by :func:`score_responses` (memory only).
SCORE_BLOCK_CELLS = 2_000_000


def check_score_prior(prior_mean, prior_sd, *, mean_location: str = "prior_mean",
                      sd_location: str = "prior_sd") -> None:
    """Refuse a normal prior outside what :func:`score_responses` accepts.

    The mean (one number, or one per person) must be finite and lie within
    :data:`SCORE_BOUNDS`; the SD within :data:`SCORE_PRIOR_SD_RANGE`.  A prior far off the
    bounds has no mass where the estimates may lie, and an extreme one would size the
    quadrature grid by itself (a mean of 1,000 asks for a 20,000-point grid per row).

    Raises
    ------
    AdaptiveEngineError
        Located at ``mean_location`` / ``sd_location``.
    """
    checks = ((prior_mean, mean_location, "the prior mean", SCORE_BOUNDS),
              (prior_sd, sd_location, "the prior SD", SCORE_PRIOR_SD_RANGE))
    for value, where, what, (lo, hi) in checks:
        try:
            arr = np.asarray(value, dtype=float)
        except (TypeError, ValueError, OverflowError):
            raise AdaptiveEngineError(f"{what} must be a number, got {value!r}", location=where) from None
        if arr.size == 0 or not np.all(np.isfinite(arr)):
            raise AdaptiveEngineError(f"{what} must be a finite number, got {_shown_number(value)}",
                                      location=where)
        if np.any(arr < lo) or np.any(arr > hi):
            bad = arr[(arr < lo) | (arr > hi)].flat[0]
            raise AdaptiveEngineError(f"{what} must lie in [{lo:g}, {hi:g}], got {bad:g}", location=where)


def _shown_number(value) -> str:
    text = repr(value) if np.ndim(value) == 0 else "a value that is not"
    return text if len(text) <= 40 else text[:40] + "..."


def score_responses(bank, table, method: str, *, prior_mean=0.0, prior_sd=1.0) -> list[dict]:
    """Score every person of a :class:`~adaptive_engine.bank.responses.ResponseTable` on ``bank``.

    Returns one record per person (in order of first appearance): ``person_id``, ``theta``,
    ``se``, ``n_items``, ``status``.  Unknown item ids and out-of-range responses raise
    :class:`~adaptive_engine.errors.ResponseDataError` naming the file line; a prior
    outside the accepted ranges raises (see :func:`check_score_prior`).

    Memory follows the input, not the bank or the longest test: only the items answered
    are tabulated on the grid, and persons are scored in blocks of similar test length
    (:meth:`~adaptive_engine.responses.ResponseTable.padded_blocks`).  Every row is
    computed on its own, so the results equal one call of :func:`estimate` on
    :meth:`~adaptive_engine.responses.ResponseTable.to_padded`, bit for bit.
    """
    if method not in METHODS:
        raise AdaptiveEngineError(f"unknown method {method!r} (use one of {', '.join(METHODS)})",
                                  location="method")
    check_score_prior(prior_mean, prior_sd)
    n = table.n_persons
    mean = np.broadcast_to(np.asarray(prior_mean, dtype=float), (n,))
    sd = np.broadcast_to(np.asarray(prior_sd, dtype=float), (n,))
    used = np.unique(table.bank_item_index(bank))
    answered_bank = bank.subset(used) if used.size < len(bank) else bank
    theta, se = np.empty(n), np.empty(n)
    n_items, status = np.empty(n, dtype=np.int64), np.empty(n, dtype=object)
    for persons, items, responses in table.padded_blocks(bank, max_cells=SCORE_BLOCK_CELLS):
        # bank rows -> rows of the bank of answered items (padding -1 stays -1)
        rows = np.where(items >= 0, np.searchsorted(used, items), -1)
        result = estimate(answered_bank, rows, responses, method, prior_mean=mean[persons],
                          prior_sd=sd[persons], bounds=SCORE_BOUNDS)
        theta[persons], se[persons] = result.theta, result.se
        n_items[persons], status[persons] = result.n_items, result.status
    estimates = AbilityEstimates(theta=theta, se=se, n_items=n_items, method=method, status=status)
    return estimates.to_records(table.person_ids)

