"""Test-level curves over an ability grid: test information, standard error, expected score.

These sum item-level quantities from :mod:`adaptive_engine.irt.models` over the whole bank or
over a chosen set of items (a test form, the items one examinee answered, a content area).
"""

from __future__ import annotations

import numpy as np

from . import models


def _params_and_items(bank_or_params, items):
    """Item parameters of the chosen items, plus the bank (or None) they came from."""
    if isinstance(bank_or_params, models.ItemParameters):
        params, bank = bank_or_params, None
    else:
        params, bank = bank_or_params.params, bank_or_params
    if items is None:
        return params, bank, None
    index = np.asarray(items)
    if index.dtype == bool:
        index = np.flatnonzero(index)
    index = index.astype(np.int64).reshape(-1)
    n = params.a.shape[0]
    if index.size and (index.min() < 0 or index.max() >= n):
        from ..errors import AdaptiveEngineError

        raise AdaptiveEngineError(f"item index out of range 0..{n - 1}", location="items")
    return params.take(index), bank, index


def item_information(bank_or_params, theta, items=None) -> np.ndarray:
    """Fisher information of each chosen item at each ability point.

    Parameters
    ----------
    bank_or_params : ItemBank or ItemParameters
    theta : array, shape (G,)
    items : int or bool array, shape (n_chosen,), optional
        Bank rows to use; all items when omitted.

    Returns
    -------
    array, shape (n_chosen, G)
    """
    params, _, _ = _params_and_items(bank_or_params, items)
    theta = np.atleast_1d(np.asarray(theta, dtype=float))
    return models.information(*models.outer(params, theta))


def test_information(bank_or_params, theta, items=None, *, by_area: bool = False):
    """Test information ``I(theta) = sum_i I_i(theta)`` over the bank or a subset.

    Parameters
    ----------
    bank_or_params : ItemBank or ItemParameters
    theta : array, shape (G,)
    items : int or bool array, optional
        Bank rows to sum over; all items when omitted.
    by_area : bool
        Return a dict ``area -> (G,) array`` (one curve per content area, in the bank's
        area order) instead of one curve; needs an :class:`~adaptive_engine.bank.ItemBank`.

    Returns
    -------
    array, shape (G,), or dict of str -> array (G,)
    """
    per_item = item_information(bank_or_params, theta, items)
    if not by_area:
        return per_item.sum(axis=0)
    _, bank, index = _params_and_items(bank_or_params, items)
    if bank is None:
        from ..errors import AdaptiveEngineError

        raise AdaptiveEngineError("information by area needs an item bank (areas are bank data)",
                                  location="by_area")
    areas = bank.area if index is None else bank.area[index]
    return {area: per_item[areas == area].sum(axis=0) for area in bank.areas}


def standard_error_curve(bank_or_params, theta, items=None) -> np.ndarray:
    """Asymptotic standard error of the MLE, ``1 / sqrt(I(theta))`` (Lord 1980), shape (G,).

    Points where the test information is 0 get ``inf``.
    """
    info = test_information(bank_or_params, theta, items)
    with np.errstate(divide="ignore"):
        return 1.0 / np.sqrt(info)


def expected_score_curve(bank_or_params, theta, items=None) -> np.ndarray:
    """Expected total score ``sum_i sum_k k P_ik(theta)`` (test characteristic curve), shape (G,)."""
    params, _, _ = _params_and_items(bank_or_params, items)
    theta = np.atleast_1d(np.asarray(theta, dtype=float))
    return models.expected_score(*models.outer(params, theta)).sum(axis=0)

# pytest would otherwise collect ``test_information`` wherever a test module imports it.
test_information.__test__ = False
