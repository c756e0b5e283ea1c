"""File-to-file jobs behind the command line: read, compute, then write every output.

Each job computes everything before it writes anything, writes each file under a temporary
name and moves it into place, so bad input never leaves a half-written output.
"""

from __future__ import annotations

from pathlib import Path

import attrs

from ..bank.files import write_bank
from ..bank.item_bank import load_bank
from ..bank.responses import read_responses
from ..errors import CalibrationError
from ..files import check_target, write_text
from .em import CalibrationSettings, calibrate_responses
from .item_fit import fit_for_result, item_report_rows, rows_to_csv
from .linking import link_banks
from .pretest import PromotionRules, calibrate_pretest

_BANK_SUFFIXES = (".csv", ".json", ".db", ".sqlite", ".sqlite3")

#: Items whose fit p-value falls below this are counted in the calibration summary
#: (``items_below_misfit_p_threshold``; the threshold itself is ``misfit_p_threshold``).
MISFIT_P_THRESHOLD = 0.01


def _check_folder(path, option: str) -> Path:
    """Refuse an output whose folder is missing -- before any work is done, and naming the
    folder (a late failure would name the temporary file the writer uses instead)."""
    return check_target(path, location=f"{option} {path}")


def _check_bank_target(path, option: str) -> Path:
    path = Path(path)
    if path.suffix.lower() not in _BANK_SUFFIXES:
        raise CalibrationError(f"unknown bank file type {path.suffix!r} (use .csv, .json or .db)",
                               location=f"{option} {path}")
    return _check_folder(path, option)


def _write_outputs(bank, bank_path: Path | None, reports: dict[Path, str]) -> None:
    if bank_path is not None:
        write_bank(bank, bank_path)
    for path, text in reports.items():
        write_text(path, text)


def calibrate_file(
    responses_path,
    *,
    out,
    model: str | None = None,
    template_path=None,
    settings: CalibrationSettings | None = None,
    fit_report=None,
    scaling: float | None = None,
    dimensions=None,
) -> dict:
    """Calibrate a long response CSV and write the bank (and the item report).

    ``scaling`` is the D the caller asked for (None: not given).  With a template bank the
    output takes the template's D: a CSV template takes ``scaling``, a JSON/SQLite template
    keeps its own and a disagreeing ``scaling`` is an error (:func:`load_bank`).  Without a
    template the output gets ``scaling`` (default ``settings.scaling``).

    ``dimensions`` names the dimensions of a multidimensional template (see :func:`load_bank`).

    Returns
    -------
    dict
        The calibration summary, with fit counts and the files written.
    """
    out = _check_bank_target(out, "out")
    if fit_report:
        fit_report = _check_folder(fit_report, "fit_report")
    settings = settings or CalibrationSettings()
    template = load_bank(template_path, scaling=scaling, dimensions=dimensions) if template_path else None
    if template is not None:
        settings = attrs.evolve(settings, scaling=template.scaling)
    elif scaling is not None:
        settings = attrs.evolve(settings, scaling=scaling)
    table = read_responses(responses_path)
    result = calibrate_responses(table, model=model, template=template, settings=settings,
                                 name=Path(out).stem)
    if template is not None and template.uses_multidimensional_models:
        return _multidimensional_outputs(result, out, fit_report)
    fit = fit_for_result(result)
    reports = {}
    if fit_report:
        reports[Path(fit_report)] = rows_to_csv(item_report_rows(result, fit))
    _write_outputs(result.bank, out, reports)
    summary = result.summary()
    summary.update(fit_statistic=fit.statistic_name, misfit_p_threshold=MISFIT_P_THRESHOLD,
                   items_below_misfit_p_threshold=int((fit.p_value < MISFIT_P_THRESHOLD).sum()),
                   out=str(out), fit_report=str(fit_report) if fit_report else None)
    return summary


def _multidimensional_outputs(result, out: Path, fit_report) -> dict:
    """Write the bank (and a report of every item's parameters and standard errors: item fit
    statistics are not computed for multidimensional items) of a multidimensional calibration."""
    reports = {}
    if fit_report:
        reports[Path(fit_report)] = rows_to_csv(result.item_rows())
    _write_outputs(result.bank, out, reports)
    summary = result.summary()
    summary.update(fit_statistic=None, out=str(out), fit_report=str(fit_report) if fit_report else None)
    return summary


def link_files(new_path, *, to, out, method: str, anchors=None, max_difficulty_shift: float = 0.5,
               max_slope_ratio: float = 1.5, scaling: float | None = None) -> dict:
    """Link the bank in ``new_path`` to the bank in ``to`` and write the linked bank."""
    out = _check_bank_target(out, "out")
    new = load_bank(new_path, scaling=scaling)
    base = load_bank(to, scaling=scaling)
    result = link_banks(new, base, method=method, anchors=anchors,
                        max_difficulty_shift=max_difficulty_shift, max_slope_ratio=max_slope_ratio)
    _write_outputs(result.linked, out, {})
    summary = result.summary()
    summary["out"] = str(out)
    return summary


def check_pretest_outputs(*, out, report=None) -> tuple[Path, Path | None]:
    """Check the outputs of :func:`pretest_files` before anything is read or computed."""
    out = _check_bank_target(out, "out")
    if report:
        report = _check_folder(report, "report")
    return out, report or None


def pretest_files(events, *, bank, bank_id: str, out, rules: PromotionRules | None = None,
                  settings: CalibrationSettings | None = None, report=None,
                  include_not_ready: bool = False) -> dict:
    """Calibrate the pretest items of a bank's sessions; write them as a bank (and a report).

    ``events``, ``bank`` and ``bank_id`` are what
    :meth:`adaptive_engine.live.store.SessionStore.bank_answers` reads from a session store
    (see :func:`.pretest.calibrate_pretest`).  The bank file holds only the items ready for
    promotion unless ``include_not_ready`` (a bank file has no place for readiness, so an
    unready item in it would look ready); the report lists every item with its ``ready``
    flag and reasons.  When no item is ready and ``include_not_ready`` is not set, no bank
    file is written and the summary's ``warnings`` say so.
    """
    out, report = check_pretest_outputs(out=out, report=report)
    result = calibrate_pretest(events, bank=bank, bank_id=bank_id, rules=rules, settings=settings)
    reports = {}
    if report:
        reports[Path(report)] = rows_to_csv([{k: ("" if isinstance(v, float) and v != v else v)
                                              for k, v in row.items()} for row in result.rows])
    bank = result.bank if include_not_ready else result.ready_bank()
    _write_outputs(bank, out if bank is not None else None, reports)
    summary = dict(result.summary)
    summary.update(items=result.rows, out=str(out) if bank is not None else None,
                   items_written=0 if bank is None else len(bank), include_not_ready=bool(include_not_ready),
                   report=str(report) if report else None, warnings=[])
    if bank is None:
        summary["warnings"].append(f"no pretest item is ready; {out} was not written "
                                   f"(asked to include the items not ready, it writes every item)")
    return summary
