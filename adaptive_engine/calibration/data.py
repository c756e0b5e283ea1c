"""Response data lined up for calibration: items, their models, and sparse answer lists.

Checks made here, each naming the item (and the file line where one answer is at fault):
responses outside the model's categories, items answered by too few people, constant
items (every answer in one category), and polytomous items with an unused middle category.
"""

from __future__ import annotations

import attrs
import numpy as np
import scipy.sparse as sp

from ..bank.item_bank import ItemBank, canonical_model
from ..bank.responses import ResponseTable
from ..errors import CalibrationError, Problem
from ..irt import models
from ..irt.multidimensional import MULTIDIMENSIONAL_MODEL_FAMILY

#: category family of every model a template may hold
_FAMILY = {**models.MODEL_FAMILY, **MULTIDIMENSIONAL_MODEL_FAMILY}


def require_one_dimensional(bank: ItemBank, location: str) -> None:
    """Refuse a bank of multidimensional models (M2PL, M3PL, MGRM): the calibration, linking
    and pretest methods here estimate one-dimensional models."""
    if bank.uses_multidimensional_models:
        raise CalibrationError(
            f"bank {bank.name or ''} holds multidimensional models (M2PL, M3PL, MGRM) with "
            f"{bank.n_dimensions} dimension{'s' if bank.n_dimensions != 1 else ''}; calibration, linking and "
            "pretest calibration work with banks of one-dimensional models", location=location)


@attrs.frozen(eq=False, kw_only=True)
class CalibrationData:
    """Answers ready for the EM cycles.

    Attributes
    ----------
    item_ids : object array, shape (n,)
    item_models : object array, shape (n,)
    n_categories : int array, shape (n,)
    person_ids : object array, shape (P,)
    person, item, response : int arrays, shape (N,)
        One entry per answer; ``item`` indexes ``item_ids``.
    template : ItemBank or None
        Bank the items' models (and metadata, starting values) came from.
    """

    item_ids: np.ndarray
    item_models: np.ndarray
    n_categories: np.ndarray
    person_ids: np.ndarray
    person: np.ndarray
    item: np.ndarray
    response: np.ndarray
    template: ItemBank | None = None

    @property
    def n_items(self) -> int:
        return int(self.item_ids.shape[0])

    @property
    def n_persons(self) -> int:
        return int(self.person_ids.shape[0])

    @property
    def max_categories(self) -> int:
        return int(max(2, self.n_categories.max()))

    def answer_matrix(self) -> sp.csr_matrix:
        """Indicator matrix, shape (P, n * C): 1 where person p answered item j in category k.

        Column ``j * C + k``.  Log-likelihoods on a grid are ``S @ log_p`` and expected
        counts are ``S.T @ posterior`` -- sparse products, never a dense persons x items array.
        """
        c = self.max_categories
        return sp.csr_matrix(
            (np.ones(self.person.shape[0]), (self.person, self.item * c + self.response)),
            shape=(self.n_persons, self.n_items * c),
        )

    def category_counts(self) -> np.ndarray:
        """Observed answers per item and category, shape (n, C)."""
        c = self.max_categories
        return np.bincount(self.item * c + self.response, minlength=self.n_items * c).reshape(-1, c).astype(float)

    def is_complete(self) -> bool:
        """Whether every person answered every item."""
        return self.person.shape[0] == self.n_items * self.n_persons


def prepare_data(
    table: ResponseTable,
    *,
    model: str | None = None,
    template: ItemBank | None = None,
    min_answers: int = 20,
    multidimensional: bool = False,
) -> CalibrationData:
    """Line up a response table with the models to be fitted.

    Parameters
    ----------
    table : ResponseTable
    model : str, optional
        One model name for every item (1PL, 2PL, 3PL, 4PL, GRM, GPCM, Rasch, PCM).
    template : ItemBank, optional
        Gives each item its own model and number of categories (mixed banks); items of the
        template nobody answered are left out.  ``model``, when also given, overrides it.
    min_answers : int
        Fewest answers an item needs.
    multidimensional : bool
        Whether the template may be a bank of multidimensional models (for
        :mod:`.multidimensional_em`); otherwise such a template is refused.

    Raises
    ------
    CalibrationError
        Naming every item (and line) at fault.
    """
    if model is None and template is None:
        raise CalibrationError("give a model or a template bank", location="calibrate")
    canonical = None
    if model is not None:
        canonical = canonical_model(model)
        if canonical is None:
            raise CalibrationError(f"unknown model {model!r} (use one of {', '.join(models.MODEL_FAMILY)})",
                                   location="model")
    if template is not None:
        if not multidimensional:
            require_one_dimensional(template, "template")
        bank_rows = table.bank_item_index(template)  # unknown ids / categories: located errors
        used = np.unique(bank_rows)
        item_ids = template.item_ids[used]
        new_index = np.full(len(template), -1)
        new_index[used] = np.arange(used.size)
        item = new_index[bank_rows]
        models_ = np.array([canonical or m for m in template.model[used]], dtype=object)
        ncat = template.n_categories[used].copy()
        sub_template = template.subset(used)
    else:
        item_ids = table.item_ids
        item = table.item
        models_ = np.array([canonical] * item_ids.shape[0], dtype=object)
        ncat = np.zeros(item_ids.shape[0], dtype=np.int64)
        np.maximum.at(ncat, item, table.response + 1)
        sub_template = None
    dichotomous = np.array([_FAMILY[m] == models.DICHOTOMOUS for m in models_])
    problems = []
    bad = np.flatnonzero(dichotomous[item] & (table.response > 1))
    problems += [Problem(table.location(k), f"response {int(table.response[k])} to item "
                         f"{item_ids[item[k]]!r}: a {models_[item[k]]} item is scored 0 or 1")
                 for k in bad[:20]]
    ncat = np.where(dichotomous, 2, np.maximum(ncat, 2))
    data = CalibrationData(
        item_ids=np.asarray(item_ids, dtype=object), item_models=models_, n_categories=ncat,
        person_ids=table.person_ids, person=table.person, item=item, response=table.response,
        template=sub_template,
    )
    if problems:
        raise CalibrationError(problems)
    counts = data.category_counts()
    answered = counts.sum(axis=1)
    for j in range(data.n_items):
        loc = f"item {item_ids[j]}"
        used_cats = np.flatnonzero(counts[j] > 0)
        if answered[j] < min_answers:
            count = int(answered[j])
            problems.append(Problem(loc, f"answered by {count} {'person' if count == 1 else 'people'}; "
                                         f"at least {min_answers} are needed (see min_answers)"))
        elif used_cats.size == 1:
            problems.append(Problem(loc, f"every answer is {int(used_cats[0])}: a constant item cannot be "
                                         f"calibrated"))
        elif not dichotomous[j]:
            empty = [k for k in range(int(ncat[j])) if counts[j, k] == 0]
            if empty:
                problems.append(Problem(loc, f"category {empty[0]} of 0..{int(ncat[j]) - 1} has no answers; "
                                             f"its threshold cannot be estimated (recode or collapse it)"))
    if problems:
        raise CalibrationError(problems)
    return data
