"""Item fit: S-X2 on summed scores, a grouped posterior chi-square for sparse data, and
infit/outfit mean squares for Rasch (1PL) items.

* S-X2 (Orlando & Thissen 2000): persons are grouped by their summed score; the expected
  proportion in each category of item j at score s is
  ``E_jks = int P_jk(t) f_{-j}(s - k | t) phi(t) dt / int f(s | t) phi(t) dt`` where ``f`` is
  the summed-score likelihood of the whole test and ``f_{-j}`` that of the test without item
  j (Lord & Wingersky 1984 recursion).  Scores whose category is forced (the lowest and the
  highest) are left out; neighbouring scores are merged until every expected count in a group
  is at least ``min_expected`` (1 in Orlando & Thissen; common practice).  For polytomous items
  the category sum follows Kang & Chen (2008).  df = groups x (categories - 1) - parameters.
  S-X2 needs complete data (every person answered every item).
* Grouped posterior chi-square, for adaptive (sparse) data and pretest items: persons who
  answered the item are sorted by their posterior mean and cut into equal groups; expected
  counts are sums of each person's posterior-weighted category probabilities (after Yen's
  1981 Q1 with posterior expectations in place of point estimates).
  df = groups x (categories - 1) - parameters; the chi-square reference is approximate.
* Infit / outfit (Wright & Masters 1982) for Rasch-like items (1PL, or 2PL / GPCM items
  calibrated with one common slope, i.e. Rasch and partial credit) with each person's EAP in
  place of theta: outfit = mean squared standardised residual, infit = information-weighted.
"""

from __future__ import annotations

import csv
import io
import math

import attrs
import numpy as np
from scipy.special import logsumexp
from scipy.stats import chi2

from ..bank.item_bank import ItemBank
from ..irt import models

#: estimated parameters per item, by model (the shared slope of 1PL items is not counted)
MODEL_PARAMETERS = {"1PL": 1, "2PL": 2, "3PL": 3, "4PL": 4}


def parameters_per_item(bank: ItemBank, *, common_slope: bool = False) -> np.ndarray:
    """Number of parameters estimated for each item, shape (n,)."""
    out = []
    for model, k in zip(bank.model, bank.n_categories):
        if model in MODEL_PARAMETERS:
            m = MODEL_PARAMETERS[model]
            out.append(m - 1 if common_slope and model != "1PL" else m)
        else:
            out.append(int(k) - 1 + (0 if common_slope else 1))
    return np.asarray(out, dtype=np.int64)


@attrs.frozen(eq=False, kw_only=True)
class ItemFit:
    """Fit statistics per item (arrays of shape (n,), in bank order).

    Attributes
    ----------
    statistic_name : str
        ``summed_score_chi_square`` (S-X2) or ``grouped_posterior_chi_square``.
    statistic, df, p_value : arrays
        NaN where the statistic could not be formed (df < 1).
    infit, outfit : arrays
        NaN for items that are not Rasch-like.
    """

    item_ids: np.ndarray
    statistic_name: str
    statistic: np.ndarray
    df: np.ndarray
    p_value: np.ndarray
    infit: np.ndarray
    outfit: np.ndarray


def normal_grid(points: int = 61, theta_range: float = 6.0):
    """Equally spaced points and normalised N(0, 1) log weights."""
    grid = np.linspace(-theta_range, theta_range, points)
    log_w = -0.5 * grid**2
    return grid, log_w - logsumexp(log_w)


def summed_score_likelihood(probs: np.ndarray, n_categories: np.ndarray) -> np.ndarray:
    """Lord-Wingersky recursion: P(summed score = s | theta_g).

    Parameters
    ----------
    probs : array, shape (n, G, C)
        Category probabilities of each item at each point.
    n_categories : int array, shape (n,)

    Returns
    -------
    array, shape (G, S + 1) with ``S = sum(n_categories - 1)``
    """
    g = probs.shape[1]
    total = int(np.sum(n_categories - 1))
    f = np.zeros((g, total + 1))
    f[:, 0] = 1.0
    top = 0
    for j in range(probs.shape[0]):
        k_max = int(n_categories[j]) - 1
        new = np.zeros_like(f)
        for k in range(k_max + 1):
            new[:, k:top + k + 1] += f[:, :top + 1] * probs[j, :, k][:, None]
        f = new
        top += k_max
    return f


def summed_score_expectations(bank: ItemBank, grid, log_weights):
    """Expected category proportions of each item at each summed score.

    Returns
    -------
    expected : array, shape (n, S + 1, C)
        ``E_jks``; NaN where the score has zero probability.
    score_probability : array, shape (S + 1,)
        Model-implied distribution of the summed score.
    """
    probs = models.probabilities(*models.outer(bank.params, grid))
    ncat = bank.n_categories
    weights = np.exp(log_weights)
    full = summed_score_likelihood(probs, ncat)
    denom = weights @ full  # (S+1,)
    n, c = probs.shape[0], probs.shape[2]
    s_max = full.shape[1] - 1
    expected = np.full((n, s_max + 1, c), np.nan)
    for j in range(n):
        rest = np.delete(np.arange(n), j)
        f_minus = summed_score_likelihood(probs[rest], ncat[rest])  # (G, S - K_j + 1)
        for k in range(int(ncat[j])):
            numer = (weights * probs[j, :, k]) @ f_minus  # score of the others = s - k
            expected[j, k:k + numer.size, k] = np.divide(numer, denom[k:k + numer.size],
                                                         out=np.full(numer.size, np.nan),
                                                         where=denom[k:k + numer.size] > 0)
        expected[j, :, : int(ncat[j])] = np.nan_to_num(expected[j, :, : int(ncat[j])], nan=0.0)
    return expected, denom


def _collapse(observed, expected, min_expected):
    """Merge neighbouring rows (score groups) until every expected count >= min_expected.

    observed, expected : arrays (rows, C) of counts.  Returns merged arrays.
    """
    groups_o, groups_e = [], []
    acc_o = np.zeros(observed.shape[1])
    acc_e = np.zeros(observed.shape[1])
    for o, e in zip(observed, expected):
        acc_o = acc_o + o
        acc_e = acc_e + e
        if acc_e.min() >= min_expected:
            groups_o.append(acc_o)
            groups_e.append(acc_e)
            acc_o = np.zeros_like(acc_o)
            acc_e = np.zeros_like(acc_e)
    if acc_e.sum() > 0:
        if groups_o:
            groups_o[-1] = groups_o[-1] + acc_o
            groups_e[-1] = groups_e[-1] + acc_e
        else:
            groups_o.append(acc_o)
            groups_e.append(acc_e)
    return np.array(groups_o), np.array(groups_e)


def _chi_square(observed, expected, n_params):
    """Pearson X2 over groups x categories, df and p."""
    keep = expected > 0
    x2 = float(np.sum((observed[keep] - expected[keep]) ** 2 / expected[keep]))
    df = observed.shape[0] * (observed.shape[1] - 1) - n_params
    if df < 1:
        return x2, float(df), math.nan
    return x2, float(df), float(chi2.sf(x2, df))


def s_x2(bank: ItemBank, responses: np.ndarray, *, n_parameters=None, min_expected: float = 1.0,
         grid=None, log_weights=None):
    """S-X2 of every item.

    Parameters
    ----------
    bank : ItemBank
    responses : int array, shape (P, n)
        Complete data, columns in bank order.
    n_parameters : int array, shape (n,), optional
        Parameters estimated per item (default :func:`parameters_per_item`).
    min_expected : float

    Returns
    -------
    statistic, df, p_value : arrays, shape (n,)
    """
    if grid is None:
        grid, log_weights = normal_grid()
    n_parameters = parameters_per_item(bank) if n_parameters is None else np.asarray(n_parameters)
    expected, _ = summed_score_expectations(bank, grid, log_weights)
    score = responses.sum(axis=1)
    s_max = expected.shape[1] - 1
    n_at = np.bincount(score, minlength=s_max + 1).astype(float)
    out = np.full((3, len(bank)), np.nan)
    for j in range(len(bank)):
        c = int(bank.n_categories[j])
        obs = np.zeros((s_max + 1, c))
        np.add.at(obs, (score, responses[:, j]), 1.0)
        exp_counts = n_at[:, None] * expected[j, :, :c]
        # the lowest and highest scores force the item's category: nothing to compare there
        inner = slice(c - 1, s_max - (c - 1) + 1)
        rows = np.arange(s_max + 1)[inner]
        rows = rows[n_at[rows] > 0]
        if rows.size == 0:
            continue
        o, e = _collapse(obs[rows], exp_counts[rows], min_expected)
        out[:, j] = _chi_square(o, e, int(n_parameters[j]))
    return out[0], out[1], out[2]


def grouped_posterior_fit(bank: ItemBank, item_index, person_index, response, posterior, grid, *,
                          n_parameters=None, max_groups: int = 10, per_group: int = 50,
                          posterior_includes_item: bool = True):
    """Grouped posterior chi-square of every item in ``bank``.

    Parameters
    ----------
    item_index, person_index, response : int arrays, shape (N,)
        Sparse answers: bank row, posterior row and category.
    posterior : array, shape (P, G)
        Each person's posterior weights (sum to 1 per row).
    grid : array, shape (G,)
    max_groups, per_group : int
        ``min(max_groups, answers // per_group)`` groups (at least 2).
    posterior_includes_item : bool
        Whether ``posterior`` already holds the item's own answer; if so it is divided out
        first, because the expected count must be the prediction from the *other* answers
        (with the answer itself inside, grouping and expectation would both lean on it).

    Returns
    -------
    statistic, df, p_value : arrays, shape (n,)
    """
    n_parameters = parameters_per_item(bank) if n_parameters is None else np.asarray(n_parameters)
    probs = models.probabilities(*models.outer(bank.params, grid))  # (n, G, C)
    out = np.full((3, len(bank)), np.nan)
    order = np.argsort(item_index, kind="stable")
    bounds = np.searchsorted(item_index[order], np.arange(len(bank) + 1))
    for j in range(len(bank)):
        sel = order[bounds[j]:bounds[j + 1]]
        if sel.size < 4:
            continue
        c = int(bank.n_categories[j])
        persons = person_index[sel]
        rest = posterior[persons]
        if posterior_includes_item:
            rest = rest / np.maximum(probs[j][:, response[sel]].T, 1e-300)
            rest /= rest.sum(axis=1, keepdims=True)
        groups = max(2, min(max_groups, sel.size // per_group))
        ranked = np.argsort(rest @ grid, kind="stable")
        label = np.empty(sel.size, dtype=np.int64)
        label[ranked] = np.arange(sel.size) * groups // sel.size
        obs = np.zeros((groups, c))
        np.add.at(obs, (label, response[sel]), 1.0)
        exp = np.zeros((groups, c))
        np.add.at(exp, label, rest @ probs[j, :, :c])
        out[:, j] = _chi_square(obs, exp, int(n_parameters[j]))
    return out[0], out[1], out[2]


def rasch_like_items(bank: ItemBank, *, common_slope: bool = False) -> np.ndarray:
    """Items of the Rasch family, bool shape (n,): 1PL items, and -- when every item shares
    one slope -- 2PL items (the Rasch model) and GPCM items (the partial credit model)."""
    model = np.asarray(bank.model)
    rasch = model == "1PL"
    if common_slope:
        rasch |= (model == "2PL") | (model == "GPCM")
    return rasch


def rasch_mean_squares(bank: ItemBank, item_index, theta, response, *, rasch=None):
    """Infit and outfit mean squares; NaN for items that are not Rasch-like.

    Parameters
    ----------
    item_index : int array, shape (N,)
    theta : array, shape (N,)
        Ability of the person who gave each answer (e.g. the EAP).
    response : int array, shape (N,)
    rasch : bool array, shape (n,), optional
        Which items get the mean squares (default: the 1PL items).
    """
    params = bank.params.take(item_index)
    p = models.probabilities(params, theta)
    cats = np.arange(p.shape[-1])
    mean = p @ cats
    var = np.sum(p * (cats - mean[:, None]) ** 2, axis=1)
    sq = (response - mean) ** 2
    n = len(bank)
    count = np.bincount(item_index, minlength=n)
    with np.errstate(invalid="ignore", divide="ignore"):
        outfit = np.bincount(item_index, sq / np.maximum(var, 1e-12), minlength=n) / count
        infit = np.bincount(item_index, sq, minlength=n) / np.bincount(item_index, var, minlength=n)
    rasch = bank.model == "1PL" if rasch is None else np.asarray(rasch, dtype=bool)
    return np.where(rasch, infit, np.nan), np.where(rasch, outfit, np.nan)


def fit_for_result(result) -> ItemFit:
    """Item fit of a :class:`~adaptive_engine.calibration.CalibrationResult`.

    S-X2 when the data are complete, else the grouped posterior chi-square; infit/outfit
    for Rasch-like items (1PL, or 2PL/GPCM calibrated with one common slope, e.g. PCM).
    """
    data, bank = result.data, result.bank
    n_params = parameters_per_item(bank, common_slope=result.settings.common_slope)
    if data.is_complete():
        x = np.zeros((data.n_persons, data.n_items), dtype=np.int64)
        x[data.person, data.item] = data.response
        grid, log_w = normal_grid(result.settings.quadrature_points, result.settings.theta_range)
        stat, df, p = s_x2(bank, x, n_parameters=n_params, grid=grid, log_weights=log_w)
        name = "summed_score_chi_square"
    else:
        stat, df, p = grouped_posterior_fit(bank, data.item, data.person, data.response,
                                            result.posterior, result.grid, n_parameters=n_params)
        name = "grouped_posterior_chi_square"
    infit, outfit = rasch_mean_squares(bank, data.item, result.eap[data.person], data.response,
                                       rasch=rasch_like_items(bank, common_slope=result.settings.common_slope))
    return ItemFit(item_ids=bank.item_ids, statistic_name=name, statistic=stat, df=df, p_value=p,
                   infit=infit, outfit=outfit)


def item_report_rows(result, fit: ItemFit | None = None) -> list[dict]:
    """One row per item: parameters, standard errors, answers and fit."""
    bank, ses = result.bank, result.standard_errors
    answers = np.bincount(result.data.item, minlength=len(bank))
    k_max = bank.thresholds.shape[1]
    rows = []
    for j in range(len(bank)):
        row = dict(item_id=str(bank.item_ids[j]), model=str(bank.model[j]), answers=int(answers[j]))
        for name in ("a", "b", "c", "d"):
            row[name] = _fmt(getattr(bank, name)[j])
            row[f"se_{name}"] = _fmt(ses[name][j])
        for k in range(k_max):
            row[f"b{k + 1}"] = _fmt(bank.thresholds[j, k])
            row[f"se_b{k + 1}"] = _fmt(ses["thresholds"][j, k]) if ses["thresholds"].shape[1] > k else ""
        if fit is not None:
            row.update(fit_statistic=fit.statistic_name, fit_value=_fmt(fit.statistic[j]),
                       fit_df=_fmt(fit.df[j]), fit_p=_fmt(fit.p_value[j]),
                       infit=_fmt(fit.infit[j]), outfit=_fmt(fit.outfit[j]))
        rows.append(row)
    return rows


def rows_to_csv(rows: list[dict]) -> str:
    """CSV text of report rows (header from the first row)."""
    buffer = io.StringIO()
    writer = csv.DictWriter(buffer, fieldnames=list(rows[0]), lineterminator="\n")
    writer.writeheader()
    writer.writerows(rows)
    return buffer.getvalue()


def _fmt(value) -> str:
    value = float(value)
    return "" if not math.isfinite(value) else f"{value:.6g}"
