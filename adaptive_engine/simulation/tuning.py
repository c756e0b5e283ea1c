"""Stopping-rule tuning: run variants of a design on the same examinees and compare.

Every combination of the varied settings runs on the same true abilities with the same
seed, so examinee i gets the same random streams (decisions and answers) in every
variant -- common random numbers: differences between variants are the settings' doing,
not sampling noise.  A combination is on the *efficient frontier* when no other is at least
as good on mean length (lower), RMSE (lower) and classification accuracy (higher, when the
design has cut scores) and strictly better on one.
"""

from __future__ import annotations

import itertools
import math
import tomllib
import warnings

import attrs
import numpy as np

from ..bank.item_bank import ItemBank
from ..design.bank_fit import require_design_fits_bank, runs_multidimensional
from ..design.toml_file import design_as_dict, design_from_dict
from ..design.types import RENAMED_KEYS, Design
from ..errors import DeprecatedDesignKey, DesignError, Problem
from ..files import prepare_folder, write_texts
from . import metrics
from .engine import Execution, simulate
from .population import Population


@attrs.frozen(kw_only=True)
class Variation:
    """One varied setting: a dotted design key and the values it takes."""

    key: str
    values: tuple


def _value(text: str):
    """A TOML scalar from its text (numbers, true/false, quoted or bare strings)."""
    text = text.strip()
    try:
        return tomllib.loads(f"v = {text}")["v"]
    except tomllib.TOMLDecodeError:
        return text


def parse_variation(text: str) -> Variation:
    """``SECTION.KEY=V1,V2,...`` (e.g. ``stopping.se=0.25,0.3`` or ``stopping.sprt.alpha=0.05,0.1``).

    A renamed key in its old spelling is read under its new name, with a
    :class:`~adaptive_engine.errors.DeprecatedDesignKey` warning.
    """
    key, sep, values = str(text).partition("=")
    key = key.strip()
    parts = [v for v in values.split(",") if v.strip()]
    if not sep or "." not in key or not parts:
        raise DesignError(f"expected SECTION.KEY=V1,V2,..., got {text!r}", "variations")
    return Variation(key=_current_key(key, stacklevel=3), values=tuple(_value(v) for v in parts))


def _current_key(key: str, *, stacklevel: int) -> str:
    """A dotted design key in its current spelling (an old one read with a warning)."""
    section, _, name = key.rpartition(".")
    new = RENAMED_KEYS.get((section, name))
    if new is None:
        return key
    warnings.warn(f"[{section}] {name}: renamed to {new}; the old name is read until the next release",
                  DeprecatedDesignKey, stacklevel=stacklevel)
    return f"{section}.{new}"


def apply_settings(design: Design, settings: dict) -> Design:
    """``design`` with dotted keys set to new values (read like a design file)."""
    data = design_as_dict(design)
    for key, value in settings.items():
        *path, last = _current_key(key, stacklevel=3).split(".")
        node = data
        for part in path:
            nxt = node.get(part) if isinstance(node, dict) else None
            if nxt is None:
                if isinstance(node, dict) and part in node:
                    nxt = node[part] = {}  # an optional sub-table the design leaves out
                else:
                    raise DesignError(f"the design has no section {part!r}", f"variations {key}")
            node = nxt
        if not isinstance(node, dict) or (last not in node and node):
            raise DesignError(f"the design has no key {last!r} in [{'.'.join(path)}]", f"variations {key}")
        node[last] = value
    try:
        return design_from_dict(data)
    except DesignError as exc:
        where = ", ".join(settings)
        raise DesignError([Problem(f"variations ({where}) {p.location}", p.message) for p in exc.problems]) from None


def efficient_frontier(length, rmse, accuracy=None) -> np.ndarray:
    """bool (M,): combinations no other one dominates (lower length and RMSE, higher accuracy)."""
    cols = [np.asarray(length, dtype=float), np.asarray(rmse, dtype=float)]
    if accuracy is not None:
        cols.append(-np.asarray(accuracy, dtype=float))
    x = np.stack(cols, axis=1)
    x = np.where(np.isfinite(x), x, np.inf)
    m = x.shape[0]
    keep = np.ones(m, dtype=bool)
    for i in range(m):
        others = np.delete(x, i, axis=0)
        dominated = np.all(others <= x[i], axis=1) & np.any(others < x[i], axis=1)
        keep[i] = not dominated.any()
    return keep


def tune(design: Design, bank: ItemBank, variations: list[Variation], *, population: Population,
         execution: Execution = Execution()) -> list[dict]:
    """Run every combination of ``variations`` on the same examinees; one row per combination.

    ``population``: the simulated examinees, the same for every combination.
    ``execution.progress(done, total)``, when given, counts simulated examinees over all
    combinations (``total`` = combinations x examinees).

    Returns
    -------
    list of dict
        The varied settings, then ``mean_length``, ``sd_length``, ``rmse``, ``bias``,
        ``mean_se``, ``rmse_to_mean_se``, ``max_exposure``, ``accuracy_<cut>`` per cut score,
        and ``frontier`` (bool).
    """
    if runs_multidimensional(design, bank):
        raise DesignError("the design runs on the multidimensional kernel (ability vectors); tune it with "
                          "adaptive_engine.simulation.multidimensional_tuning.tune_multidimensional(design, bank, "
                          "variations, true_theta=(N, K) array, seed=...) or `adaptive-engine tune`", "design")
    keys, combos, designs = variant_designs(design, bank, variations)
    rows = []
    n = population.size
    total = len(combos) * n
    progress = execution.progress
    for k, (combo, d) in enumerate(zip(combos, designs)):
        inner = None
        if progress is not None:
            def inner(done, _n, base=k * n):
                progress(base + done, total)
        result = simulate(d, bank, population=population, execution=attrs.evolve(execution, progress=inner))
        s = metrics.summarize(result)
        row = dict(zip(keys, combo))
        row.update(mean_length=s["mean_length"], sd_length=s["length"]["sd_length"],
                   share_at_max_items=s["length"]["share_at_max_items"], rmse=s["rmse"], bias=s["bias"],
                   mean_se=s["mean_se"], rmse_to_mean_se=s["rmse_to_mean_se"], max_exposure=s["max_exposure"])
        for c in s["classification"]:
            row[f"accuracy_{c['cut']}"] = c["accuracy"]
        rows.append(row)
    return mark_frontier(rows)


def variant_designs(design: Design, bank: ItemBank, variations: list[Variation]) -> tuple[list, list, list]:
    """The varied keys, every combination of their values and its design, each design
    checked against the bank before any work starts (DesignError naming ``variations``)."""
    if not variations:
        raise DesignError("give at least one variation SECTION.KEY=V1,V2,...", "variations")
    keys = [v.key for v in variations]
    if len(set(keys)) != len(keys):
        raise DesignError("a key is varied twice", "variations")
    combos = list(itertools.product(*[v.values for v in variations]))
    designs = [apply_settings(design, dict(zip(keys, combo))) for combo in combos]
    for d in designs:
        require_design_fits_bank(d, bank)
    return keys, combos, designs


def mark_frontier(rows: list[dict]) -> list[dict]:
    """Set each row's ``frontier`` flag: on the efficient frontier of mean length, RMSE and
    the mean of its ``accuracy_*`` columns (when there are cut scores).  Returns ``rows``."""
    acc_keys = [k for k in rows[0] if k.startswith("accuracy_")]
    accuracy = None
    if acc_keys:
        accuracy = [np.mean([r[k] if r[k] is not None else math.nan for k in acc_keys]) for r in rows]
    front = efficient_frontier([r["mean_length"] for r in rows], [r["rmse"] for r in rows], accuracy)
    for r, f in zip(rows, front):
        r["frontier"] = bool(f)
    return rows


def _tradeoff_plot(rows, key: str, ylabel: str, title: str, description: str) -> str:
    """Mean length against one criterion; frontier points filled, numbered as in the table."""
    from .svg_chart import Chart

    x = np.array([np.nan if r["mean_length"] is None else r["mean_length"] for r in rows], dtype=float)
    y = np.array([np.nan if r.get(key) is None else r[key] for r in rows], dtype=float)
    front = np.array([bool(r["frontier"]) for r in rows])
    chart = Chart("mean test length (scored items)", title=title)
    panel = chart.panel(260, ylabel)
    # wide margins: room for the numbers beside the outermost points
    ok = np.isfinite(x) & np.isfinite(y)
    if ok.any():
        for values, axis in ((x[ok], "x"), (y[ok], "y")):
            lo, hi = float(values.min()), float(values.max())
            pad = (hi - lo) * 0.15 or (abs(lo) * 0.05 or 0.5)
            if axis == "x":
                chart.xlim = (lo - pad, hi + pad)
            else:
                panel.ylim = (lo - pad, hi + pad)
    panel.scatter(x[front], y[front], colour="crimson", label="on the frontier")
    panel.scatter(x[~front], y[~front], colour="#888888", hollow=True, label="dominated by another combination")
    # combinations at the same spot share one label ("2, 5")
    groups: dict = {}
    for j, (a, b) in enumerate(zip(x, y), start=1):
        if np.isfinite(a) and np.isfinite(b):
            groups.setdefault((round(a, 6), round(b, 6)), []).append(j)
    if groups:
        panel.point_labels([k[0] for k in groups], [k[1] for k in groups],
                           [", ".join(str(j) for j in v) for v in groups.values()])
    return chart.svg(description)


def tradeoff_figures(rows: list[dict], keys: list[str]) -> list:
    """(caption, SVG) per frontier criterion plotted against mean length.

    One plot of RMSE, and one of classification accuracy per cut score when the design
    has cut scores: every criterion of the efficient frontier is shown.
    """
    if not rows:
        return []
    varied = ", ".join(keys)
    caption = ("Mean test length against RMSE, one point per combination (numbered as in the table); filled: on "
               "the efficient frontier")
    out = [(caption, _tradeoff_plot(rows, "rmse", "RMSE (theta units)", f"Length against precision ({varied})",
                                    caption))]
    for key in [k for k in rows[0] if k.startswith("accuracy_")]:
        cut = key[len("accuracy_"):]
        caption = (f"Mean test length against classification accuracy at the cut '{cut}'; filled: on the "
                   "efficient frontier")
        out.append((caption, _tradeoff_plot(rows, key, f"classification accuracy ({cut})",
                                            f"Length against accuracy ({varied})", caption)))
    return out


def run_tuning_study(design: Design, bank: ItemBank, variations: list[Variation], *, population: Population,
                     out_dir, execution: Execution = Execution()) -> list[dict]:
    """:func:`tune`, then write ``tuning.csv``, ``tuning.json`` and ``tuning.html`` into ``out_dir``."""
    import json

    from .html_report import tuning_report_html
    from .study import rows_csv

    out, _ = prepare_folder(out_dir)  # before the long run: a bad folder fails at once
    rows = tune(design, bank, variations, population=population, execution=execution)
    keys = [v.key for v in variations]
    # every file is complete before any is renamed into place
    texts = {
        "tuning.csv": rows_csv(rows),
        "tuning.json": json.dumps({"seed": int(population.seed), "examinees": population.size, "varied": keys,
                                   "rows": rows}, indent=2, allow_nan=False, default=float) + "\n",
        "tuning.html": tuning_report_html(rows, tradeoff_figures(rows, keys), varied=keys,
                                          title=f"Tuning {design.source or 'a design'}: " + ", ".join(keys)),
    }
    write_texts(out, texts)
    return rows
