"""Tuning of a design that runs on the multidimensional kernel (ability vectors).

The counterpart of :func:`adaptive_engine.simulation.tuning.tune` for a K-dimensional
design: every combination of the varied settings runs on the same true ability vectors
(drawn once, by :func:`adaptive_engine.simulation.population.draw_vectors`) with the same
run seed, so examinee ``i`` gets the same random streams in every variant (common random
numbers).  A row per combination gives the mean length, the RMSE, bias and mean SE of every
dimension, the precision criterion and, when the design has cut scores, the classification
accuracy of the composite.

The *precision criterion* (the row's ``rmse``, with its ``bias``, ``mean_se`` and
``rmse_to_mean_se``) is the composite ``w . theta`` of ``[reporting] composite_weights``
when the design has one, else the dimension with the largest RMSE in that row (the worst
dimension; named in ``precision_of``).  The efficient frontier is taken on mean length,
that RMSE and the composite's classification accuracy, as in the one-dimensional tuning.
"""

from __future__ import annotations

import json

import numpy as np

from ..bank.item_bank import ItemBank
from ..design.bank_fit import runs_multidimensional
from ..design.types import Design
from ..errors import DesignError
from ..files import prepare_folder, write_texts
from .multidimensional_engine import (
    DEFAULT_CHUNK,
    multidimensional_metrics,
    simulate_multidimensional,
)
from .tuning import Variation, mark_frontier, variant_designs


def _combinations(design: Design, bank: ItemBank, variations: list[Variation]):
    keys, combos, designs = variant_designs(design, bank, variations)
    for combo, d in zip(combos, designs):
        if not runs_multidimensional(d, bank):
            where = ", ".join(f"{k}={v!r}" for k, v in zip(keys, combo))
            raise DesignError("this combination runs on the one-dimensional kernel while the design runs on the "
                              "multidimensional one; vary settings that keep the ability a vector",
                              f"variations ({where})")
    return keys, combos, designs


def variant_row(result) -> dict:
    """The figures of one variant's run (the row of :func:`tune_multidimensional` without its settings)."""
    s = multidimensional_metrics(result)
    dims = s["dimensions"]
    if "composite" in s:
        of, crit = "composite", s["composite"]
    else:
        of = max(dims, key=lambda name: dims[name]["rmse"])
        crit = dims[of]
    n = result.n_scored
    row = dict(mean_length=s["length"]["mean"], sd_length=s["length"]["sd"],
               share_at_max_items=float(np.mean(n >= result.design.stopping.max_items)),
               rmse=crit["rmse"], precision_of=of, bias=crit["bias"], mean_se=crit["mean_se"],
               rmse_to_mean_se=crit["rmse_to_mean_se"],
               rmse_worst_dimension=max(d["rmse"] for d in dims.values()))
    for name, d in dims.items():
        row[f"rmse_{name}"] = d["rmse"]
    for name, d in dims.items():
        row[f"bias_{name}"] = d["bias"]
    for name, d in dims.items():
        row[f"mean_se_{name}"] = d["mean_se"]
    row["max_exposure"] = s["exposure"]["max_rate"]
    for c in s.get("classification", []):
        row[f"accuracy_{c['cut']}"] = c["accuracy"]
    return row


def tune_multidimensional(design: Design, bank: ItemBank, variations: list[Variation], *, true_theta, seed: int,
                          chunk_size: int = DEFAULT_CHUNK, progress=None, workers: int = 1) -> list[dict]:
    """Run every combination of ``variations`` on the same examinees ``true_theta`` (N, K); a row each.

    ``progress(done, total)``, when given, counts simulated examinees over all
    combinations (``total`` = combinations x examinees).  ``workers > 1`` runs each
    combination's chunks on that many processes (the same rows).

    Returns
    -------
    list of dict
        The varied settings, then ``mean_length``, ``sd_length``, ``share_at_max_items``,
        ``rmse``, ``precision_of`` (``composite`` or the worst dimension's name), ``bias``,
        ``mean_se``, ``rmse_to_mean_se`` (all of the precision criterion),
        ``rmse_worst_dimension``, ``rmse_<dim>``, ``bias_<dim>``, ``mean_se_<dim>`` per
        dimension, ``max_exposure``, ``accuracy_<cut>`` per cut score (the composite's
        classification) and ``frontier`` (bool).

    Raises
    ------
    DesignError
        No variation, a key varied twice, a combination that does not fit the bank or
        leaves the multidimensional kernel (located at ``variations``).
    SimulationError
        ``true_theta`` not (N, K) finite (see :func:`simulate_multidimensional`).
    """
    keys, combos, designs = _combinations(design, bank, variations)
    true_theta = np.asarray(true_theta, dtype=float)
    n = true_theta.shape[0] if true_theta.ndim else 0
    total = len(combos) * n
    rows = []
    for k, (combo, d) in enumerate(zip(combos, designs)):
        inner = None
        if progress is not None:
            def inner(done, _n, base=k * n):
                progress(base + done, total)
        result = simulate_multidimensional(d, bank, true_theta=true_theta, seed=seed, chunk_size=chunk_size,
                                           progress=inner, workers=workers)
        row = dict(zip(keys, combo))
        row.update(variant_row(result))
        rows.append(row)
    return mark_frontier(rows)


def run_multidimensional_tuning_study(design: Design, bank: ItemBank, variations: list[Variation], *, true_theta,
                                      seed: int, out_dir, abilities: str | None = None,
                                      chunk_size: int = DEFAULT_CHUNK, progress=None, workers: int = 1) -> list[dict]:
    """:func:`tune_multidimensional`, then ``tuning.csv``, ``tuning.json`` and ``tuning.html`` in ``out_dir``.

    The page has the table (every dimension's RMSE beside the criterion) and the
    trade-off plots of mean length against the criterion's RMSE and against the
    composite's classification accuracy.
    """
    from .html_report import tuning_report_html
    from .study import rows_csv
    from .tuning import tradeoff_figures

    _combinations(design, bank, variations)  # bad variations fail before the folder is made
    out, created = prepare_folder(out_dir)  # before the long run: a bad folder fails at once
    try:
        rows = tune_multidimensional(design, bank, variations, true_theta=true_theta, seed=seed,
                                     chunk_size=chunk_size, progress=progress, workers=workers)
    except BaseException:
        if created:
            out.rmdir()  # nothing is left of a run that failed
        raise
    keys = [v.key for v in variations]
    names = list(bank.dimension_names)
    criterion = ("the composite " + " + ".join(f"{w:g} {d}" for w, d in zip(design.reporting.composite_weights,
                                                                              names))
                 if design.reporting.composite_weights is not None else "the worst dimension (largest RMSE)")
    texts = {
        "tuning.csv": rows_csv(rows),
        "tuning.json": json.dumps({"seed": int(seed), "examinees": int(np.asarray(true_theta).shape[0]),
                                   "abilities": abilities, "dimensions": names, "precision_criterion": criterion,
                                   "varied": keys, "rows": rows}, indent=2, allow_nan=False, default=float) + "\n",
        "tuning.html": tuning_report_html(
            rows, tradeoff_figures(rows, keys), varied=keys,
            extra_columns=["precision_of", "rmse_worst_dimension", *(f"rmse_{d}" for d in names)],
            note=f"Ability vectors of {len(names)} dimensions ({', '.join(names)}): RMSE, bias and mean SE are "
                 f"those of {criterion}; the RMSE of every dimension follows. Classification accuracy is that of "
                 "the composite against each cut score.",
            title=f"Tuning {design.source or 'a design'}: " + ", ".join(keys)),
    }
    write_texts(out, texts)
    return rows
