"""Stopping rules: when an adaptive test ends, and why.

Every function works on a batch of B examinees (first axis) and computes each row on its
own: only elementwise operations and reductions along the last axis are used, so a batch
of one gives bit-identical results to the same row in a batch of ten thousand.

Stop reasons and their precedence
---------------------------------
:data:`STOP_REASONS` maps each reason code to its meaning, in order of precedence: when
several rules fire at the same step the first one in this order is reported.  The order
puts the reason that says most about the result first:

1. classification (``sprt_classified``, then ``confidence_interval_classified``) -- the
   test reached a decision, which the final report uses as the basis of pass/fail;
2. precision (``se_reached``, ``small_se_reduction``, ``little_information_left``) -- the
   estimate is as good as the design asks or can still get;
3. resources (``time_limit``, ``max_items``) -- the test ran out of time or items allowed;
4. ``no_eligible_item`` -- nothing could be given (bank, exposure or blueprint exhausted).

No rule stops a test before ``min_items`` scored items, nor while a blueprint minimum is
unmet (``held``), with two exceptions: ``max_items`` always stops (the design's hard
ceiling), and ``no_eligible_item`` always stops, because the kernel has no item to give --
carrying on is impossible, whatever the minimum says.  These two are absolute: holding a
test back never holds them back, whichever other rule fires at the same step.  The
time limit respects ``min_items`` too: the app decides what to do with an examinee who is
out of time before the minimum (usually: end the session without a score).
"""

from __future__ import annotations

import weakref

import numpy as np

from ..design.types import Stopping
from ..errors import AdaptiveEngineError
from ..irt import models
from ..irt.posterior import posterior_weights

#: Reason code -> meaning, in order of precedence (first wins when several fire).
STOP_REASONS: dict[str, str] = {
    "sprt_classified": (
        "the sequential probability ratio test crossed one of Wald's bounds: the examinee is "
        "classified above or below the cut"
    ),
    "confidence_interval_classified": (
        "the confidence interval around the ability estimate no longer contains the cut"
    ),
    "se_reached": "the standard error of the ability estimate fell to the target",
    "small_se_reduction": (
        "the best remaining item would reduce the standard error by less than the target"
    ),
    "little_information_left": (
        "no eligible item has more Fisher information at the estimate than the minimum"
    ),
    "time_limit": "the testing time reported by the app reached the limit",
    "max_items": "the maximum number of scored items was given",
    "no_eligible_item": "no eligible item is left to give (stops even before min_items)",
}
#: Reason codes in order of precedence.
STOP_PRECEDENCE: tuple[str, ...] = tuple(STOP_REASONS)
#: The value of :func:`stop_reasons` for an examinee who goes on.
CONTINUE = ""


def _padded_entries(params: models.ItemParameters, items, responses):
    """Validate padded (B, L) item rows and responses; return clipped rows and the mask."""
    items = np.asarray(items)
    responses = np.asarray(responses)
    if items.shape != responses.shape or items.ndim != 2:
        raise AdaptiveEngineError(
            f"items {items.shape} and responses {responses.shape} must both have shape (B, L)",
            "stopping",
        )
    n_bank = params.a.shape[0]
    if np.any(items >= n_bank):
        raise AdaptiveEngineError(f"item row index out of range for a bank of {n_bank} items",
                                  "stopping")
    given = (items >= 0) & (responses >= 0)
    rows = np.where(given, items, 0)
    bad = given & (responses >= params.n_categories[rows])
    if np.any(bad):
        r, j = np.argwhere(bad)[0]
        raise AdaptiveEngineError(
            f"response {responses[r, j]} is outside the categories of bank row {items[r, j]}",
            f"examinee row {r}, position {j + 1}")
    return rows, np.where(given, responses, -1), given


def sprt_log_likelihood_ratio(params: models.ItemParameters, items, responses, *, cut,
                              indifference) -> np.ndarray:
    """Log-likelihood ratio of the SPRT: log L(cut + delta) - log L(cut - delta).

    Reference: Wald (1947); applied to adaptive classification by Reckase (1983) and Eggen
    (1999), with the two simple hypotheses at the edges of the indifference region
    ``cut +- indifference``.

    Parameters
    ----------
    params : ItemParameters, shape (n,)
        The whole bank's parameters (``bank.params``).
    items : int array, shape (B, L)
        Bank rows of the scored items given, -1 padded.
    responses : int array, shape (B, L)
        Observed categories, -1 padded (or not answered).
    cut, indifference : float or array, shape (B,)

    Returns
    -------
    llr : float array, shape (B,)
        Positive values favour "above the cut".
    """
    rows, resp, given = _padded_entries(params, items, responses)
    cut = np.asarray(cut, dtype=float)
    delta = np.asarray(indifference, dtype=float)
    if np.any(~(delta > 0)):
        raise AdaptiveEngineError("indifference must be positive", "[stopping.sprt] indifference")
    if cut.ndim == 0 and delta.ndim == 0:
        # One (cut, delta) for the batch -- the kernel's case: look the per-item, per-category
        # ratios up in a table built once per bank, so each step costs one gather per answer.
        table = _llr_table(params, float(cut), float(delta))
        terms = table[rows, np.clip(resp, 0, None)]
    else:
        p = params.take(rows)
        terms = (models.log_likelihood(p, cut[..., None] + delta[..., None], resp)
                 - models.log_likelihood(p, cut[..., None] - delta[..., None], resp))
    return np.sum(np.where(given, terms, 0.0), axis=-1)


# Tables of log P(k | cut + delta) - log P(k | cut - delta), shape (n, C), per parameter set.
# Keyed weakly on the (frozen) ItemParameters object so that a bank's tables go with it.
_LLR_TABLES: "weakref.WeakKeyDictionary" = weakref.WeakKeyDictionary()


def _llr_table(params: models.ItemParameters, cut: float, delta: float) -> np.ndarray:
    per_params = _LLR_TABLES.setdefault(params, {})
    key = (cut, delta)
    table = per_params.get(key)
    if table is None:
        with np.errstate(invalid="ignore"):
            table = (models.log_probabilities(params, np.full(params.a.shape, cut + delta))
                     - models.log_probabilities(params, np.full(params.a.shape, cut - delta)))
        # absent categories give -inf - -inf; they are never observed (validated upstream)
        table = np.where(np.isfinite(table), table, 0.0)
        table.setflags(write=False)
        if len(per_params) >= 16:  # designs rarely use more than one or two cuts
            per_params.clear()
        per_params[key] = table
    return table


def sprt_bounds(*, alpha: float, beta: float) -> tuple[float, float]:
    """Wald's (1947) log bounds ``(log(beta / (1 - alpha)), log((1 - beta) / alpha))``."""
    if not (0.0 < alpha < 1.0 and 0.0 < beta < 1.0 and alpha + beta < 1.0):
        raise AdaptiveEngineError(
            f"alpha={alpha} and beta={beta} must lie in (0, 1) with alpha + beta < 1",
            "[stopping.sprt] alpha",
        )
    return float(np.log(beta / (1.0 - alpha))), float(np.log((1.0 - beta) / alpha))


def sprt_decision(llr, *, alpha: float, beta: float) -> np.ndarray:
    """Wald's decision from the log-likelihood ratio.

    Returns
    -------
    decision : int array, shape (B,)
        +1 (above the cut) when ``llr >= log((1 - beta) / alpha)``, -1 (below) when
        ``llr <= log(beta / (1 - alpha))``, 0 (go on) otherwise and for NaN.
    """
    lower, upper = sprt_bounds(alpha=alpha, beta=beta)
    llr = np.asarray(llr, dtype=float)
    return np.where(llr >= upper, 1, np.where(llr <= lower, -1, 0)).astype(np.int8)


def confidence_interval_decision(theta, se, *, cut, confidence: float) -> np.ndarray:
    """Classification once the confidence interval excludes the cut (Kingsbury & Weiss 1983).

    The two-sided interval is ``theta +- z se`` with ``z = Phi^-1((1 + confidence) / 2)``.

    Returns
    -------
    decision : int array, shape (B,)
        +1 when the interval lies wholly above ``cut`` (lower end > cut), -1 when wholly
        below (upper end < cut), 0 when it contains the cut or theta/se is not finite.
    """
    if not 0.0 < confidence < 1.0:
        raise AdaptiveEngineError(f"confidence {confidence} must lie in (0, 1)",
                                  "[stopping.confidence_interval] confidence")
    theta = np.asarray(theta, dtype=float)
    se = np.asarray(se, dtype=float)
    from statistics import NormalDist  # the standard normal quantile (no scipy on a session call)

    z = NormalDist().inv_cdf(0.5 + 0.5 * confidence)
    with np.errstate(invalid="ignore"):
        lo = theta - z * se
        hi = theta + z * se
        ok = np.isfinite(lo) & np.isfinite(hi)
        out = np.where(ok & (lo > cut), 1, np.where(ok & (hi < cut), -1, 0))
    return out.astype(np.int8)


def predicted_se_after(log_post, grid, next_item_log_prob, *, form: str = "log") -> np.ndarray:
    """Predicted posterior SD after one more item (Choi, Grady & Dodd 2011).

    For each response category k of the next item, the posterior after answering k is the
    current posterior times ``P_k(theta)``; its SD is weighted by the posterior predictive
    probability of k, ``m_k = sum_g w_g P_k(theta_g)``.  The result is
    ``sum_k m_k SD_k`` -- the SD the examinee can expect to have after the item.

    Parameters
    ----------
    log_post : array, shape (B, G)
        Current posterior on ``grid`` in ``form``: ``"log"``, the log density
        (unnormalised); ``"scaled"``, the density (any positive multiple).
    grid : array, shape (G,)
    next_item_log_prob : array, shape (B, G, C)
        Log category probabilities of each examinee's best next item on the grid
        (``bank.log_probability_table(grid)[best_item]``); -inf for absent categories.

    Returns
    -------
    predicted_sd : array, shape (B,)
    """
    grid = np.asarray(grid, dtype=float)
    w = posterior_weights(log_post, form)  # (B, G)
    lp = np.asarray(next_item_log_prob, dtype=float)
    total = np.zeros(w.shape[:-1])
    weighted_sd = np.zeros(w.shape[:-1])
    # One (B, G) pass per category (C is small) keeps memory flat and every sum row-wise.
    for k in range(lp.shape[-1]):
        joint = w * np.exp(lp[..., k])
        m, sd = _weighted_mean_sd(joint, grid)
        total += m
        weighted_sd += np.where(m > 0, m * sd, 0.0)
    return weighted_sd / total


def _weighted_mean_sd(weights, grid):
    """Total, and SD of ``grid`` under unnormalised ``weights`` (B, G); row-wise sums only."""
    m = np.sum(weights, axis=-1)
    safe = np.where(m > 0, m, 1.0)
    mean = np.sum(weights * grid, axis=-1) / safe
    # centred second moment: E[t^2] - E[t]^2 loses digits for tight posteriors
    var = np.sum(weights * (grid - mean[..., None]) ** 2, axis=-1) / safe
    return m, np.sqrt(np.maximum(var, 0.0))


def predicted_se_reduction(log_post, grid, next_item_log_prob, *, form: str = "log") -> np.ndarray:
    """Current posterior SD minus :func:`predicted_se_after`, shape (B,).

    Both terms come from the same posterior, so the difference is never negative (the
    expected posterior variance cannot exceed the current one, and E[SD] <= sqrt(E[var])).
    This is the quantity :func:`stop_reasons` compares with ``stopping.se_reduction``.
    """
    _, sd_now = _weighted_mean_sd(posterior_weights(log_post, form), np.asarray(grid, dtype=float))
    return sd_now - predicted_se_after(log_post, grid, next_item_log_prob, form=form)


def _needs(value, what: str, key: str, b: int):
    if value is None:
        raise AdaptiveEngineError(
            f"the design sets this rule but no {what} was supplied", f"[stopping] {key}"
        )
    value = np.asarray(value)
    if value.shape != (b,):
        raise AdaptiveEngineError(f"{what} has shape {value.shape}, expected ({b},)",
                                  f"[stopping] {key}")
    return value


def stop_reason_one(stopping: Stopping, *, n_scored: int, se: float, no_eligible: bool, held: bool) -> str | None:
    """:func:`stop_reasons` of one examinee (a live session) under a design whose rules are
    only the standard error, ``min_items`` and ``max_items`` (and a blueprint holding the
    test back): the same rules and precedence in Python numbers.  None under any other rule
    (:func:`stop_reasons` decides then)."""
    if (stopping.sprt is not None or stopping.confidence_interval is not None or stopping.se_reduction is not None
            or stopping.min_information is not None or stopping.time_limit is not None):
        return None
    allowed = n_scored >= stopping.min_items and not held
    fired = set()
    if stopping.se is not None and allowed and se <= stopping.se:  # NaN: never reached
        fired.add("se_reached")
    if n_scored >= stopping.max_items:
        fired.add("max_items")
    if no_eligible:
        fired.add("no_eligible_item")
    return next((k for k in STOP_PRECEDENCE if k in fired), CONTINUE)


def stop_reasons(stopping: Stopping, *, n_scored, se, sprt_llr=None, ci_decision=None,
                 se_reduction=None, best_information=None, elapsed=None,
                 no_eligible=None, held=None) -> np.ndarray:
    """Why each examinee's test stops now, or ``""`` to go on.

    Parameters
    ----------
    stopping : design.Stopping
    n_scored : int array, shape (B,)
        Scored items given so far.
    se : float array, shape (B,)
        Standard error of the interim estimate (NaN: unknown, never "reached").
    sprt_llr : float array, shape (B,), optional
        From :func:`sprt_log_likelihood_ratio`; required when ``stopping.sprt`` is set.
    ci_decision : int array, shape (B,), optional
        From :func:`confidence_interval_decision`; required when
        ``stopping.confidence_interval`` is set.
    se_reduction : float array, shape (B,), optional
        From :func:`predicted_se_reduction`; required when ``stopping.se_reduction`` is set.
    best_information : float array, shape (B,), optional
        Largest Fisher information at the estimate among eligible items; required when
        ``stopping.min_information`` is set.  The rule fires when it is at or below the
        minimum ("no eligible item has information above it").
    elapsed : float array, shape (B,), optional
        Seconds reported by the app, NaN when unknown (never fires); required when
        ``stopping.time_limit`` is set.
    no_eligible : bool array, shape (B,), optional
        True where the kernel found no eligible item.
    held : bool array, shape (B,), optional
        True where the test must go on for another reason than ``min_items`` (a blueprint
        minimum not yet met): every rule is held back there, as below ``min_items``,
        except ``max_items`` and ``no_eligible_item``.

    Returns
    -------
    reasons : object array of str, shape (B,)
        A code from :data:`STOP_REASONS` (highest precedence among the rules that fired),
        or ``""`` to continue.
    """
    n_scored = np.asarray(n_scored)
    if n_scored.ndim != 1:
        raise AdaptiveEngineError(f"n_scored must have shape (B,), got {n_scored.shape}",
                                  "stopping")
    b = n_scored.shape[0]
    se = np.asarray(se, dtype=float)
    if se.shape != (b,):
        raise AdaptiveEngineError(f"se has shape {se.shape}, expected ({b},)", "stopping")
    allowed = n_scored >= stopping.min_items
    if held is not None:
        allowed = allowed & ~_needs(held, "held-back flag", "held", b).astype(bool)
    never = np.zeros(b, dtype=bool)
    fired: dict[str, np.ndarray] = dict.fromkeys(STOP_PRECEDENCE, never)

    with np.errstate(invalid="ignore"):
        if stopping.sprt is not None:
            llr = _needs(sprt_llr, "SPRT log-likelihood ratio", "sprt", b)
            decision = sprt_decision(llr, alpha=stopping.sprt.alpha, beta=stopping.sprt.beta)
            fired["sprt_classified"] = allowed & (decision != 0)
        if stopping.confidence_interval is not None:
            ci = _needs(ci_decision, "confidence-interval decision", "confidence_interval", b)
            fired["confidence_interval_classified"] = allowed & (ci != 0)
        if stopping.se is not None:
            fired["se_reached"] = allowed & (se <= stopping.se)
        if stopping.se_reduction is not None:
            red = _needs(se_reduction, "predicted SE reduction", "se_reduction", b)
            fired["small_se_reduction"] = allowed & (red.astype(float) < stopping.se_reduction)
        if stopping.min_information is not None:
            info = _needs(best_information, "best item information", "min_information", b)
            fired["little_information_left"] = allowed & (
                info.astype(float) <= stopping.min_information)
        if stopping.time_limit is not None:
            t = _needs(elapsed, "elapsed time", "time_limit", b)
            fired["time_limit"] = allowed & (t.astype(float) >= stopping.time_limit)
    fired["max_items"] = n_scored >= stopping.max_items
    if no_eligible is not None:
        fired["no_eligible_item"] = _needs(no_eligible, "no-eligible flag", "no_eligible",
                                           b).astype(bool)

    # np.select over the precedence (the first rule that fired), written from the last rule
    # to the first so that a higher one overwrites; rules that cannot fire are skipped
    reasons = np.full(b, CONTINUE, dtype=object)
    for k in reversed(STOP_PRECEDENCE):
        if fired[k] is not never:
            reasons[np.asarray(fired[k], dtype=bool)] = k
    return reasons
