"""A simulation study written to a folder: summary, tables, administrations, report.

:func:`run_study` is what ``adaptive-engine simulate`` calls.  The output folder is created
when missing (the folder it sits in must exist: :mod:`adaptive_engine.files`).  Files are
written under temporary names inside the output folder and renamed into place only when
the whole run succeeded, so a failed run leaves nothing half-written; a file of
:data:`FILES` that an earlier run left in the folder and this run did not write is removed
then, so the folder never mixes two runs.

Files
-----
``summary.json``
    :func:`adaptive_engine.simulation.metrics.summarize` plus the run's settings.
``examinees.csv``
    ``examinee,true_theta,theta,se,n_scored,stop_reason,n_pretest,scaled_score,seed`` and
    one ``class_<cut>`` column per cut score (``n_scored``: scored items, ``n_pretest``:
    pretest items given besides; ``seed`` replays the examinee as a live session).
``administrations.csv``
    ``examinee,position,item_id,response,theta,se,scored`` in order of administration
    (theta, se: the interim estimate after that answer); streamed chunk by chunk.
``items.csv``
    ``item_id,exposure_rate,times_given,selection_rate,area,status``.
``conditional.csv``
    metrics by ability bin.
``report.html``
    self-contained report (:mod:`adaptive_engine.simulation.html_report`).
"""

from __future__ import annotations

import csv
import io
import json
import math
import shutil
from pathlib import Path

import attrs
import numpy as np

from ..bank.item_bank import ItemBank
from ..design.bank_fit import design_warnings, require_design_fits_bank
from ..design.types import Design
from ..errors import Problem, SimulationError
from ..files import StagedFiles, prepare_folder
from . import metrics
from .engine import ChunkResult, Execution, SimulationResult, simulate, true_item_rows
from .exposure_diagnosis import LotteryFreeCounts
from .population import DEFAULT_EXAMINEES, Population

__all__ = ["DEFAULT_EXAMINEES", "FILES", "Study", "examinees_csv", "items_csv", "read_standard_errors", "rows_csv",
           "run_study", "summary_table"]

FILES = ("summary.json", "examinees.csv", "administrations.csv", "items.csv", "conditional.csv", "report.html")


@attrs.frozen(kw_only=True, eq=False)
class Study:
    """A finished study: the result, its summary and where the files went.

    ``warnings``: :func:`~adaptive_engine.design.bank_fit.design_warnings` of the design
    on the bank (list of Problem; the run went ahead, the report shows them).
    """

    result: SimulationResult
    summary: dict
    conditional: list
    out_dir: Path | None
    warnings: list = attrs.field(factory=list)


def _num(x, digits: int = 6) -> str:
    x = float(x)
    return "" if not math.isfinite(x) else repr(round(x, digits))


class _AdministrationWriter:
    """Streams each chunk's administrations to ``administrations.csv``."""

    def __init__(self, path: Path, bank: ItemBank):
        self.handle = open(path, "w", encoding="utf-8", newline="")
        self.handle.write("examinee,position,item_id,response,theta,se,scored\n")
        self.ids = np.asarray(bank.item_ids, dtype=object)

    def __call__(self, chunk: ChunkResult) -> None:
        given = chunk.items >= 0
        ex, pos = np.nonzero(given)
        items = chunk.items[given]
        resp = chunk.responses[given]
        th = [repr(t) if t == t else "" for t in np.round(chunk.interim_theta[given], 6).tolist()]
        se = [repr(t) if t == t else "" for t in np.round(chunk.interim_se[given], 6).tolist()]
        scored = np.where(chunk.scored[given], "1", "0")
        ids = self.ids[items]
        lines = [f"{e},{p},{i},{r},{t},{s},{sc}" for e, p, i, r, t, s, sc in
                 zip((ex + chunk.start).tolist(), (pos + 1).tolist(), ids, resp.tolist(), th, se, scored)]
        if lines:
            self.handle.write("\n".join(lines))
            self.handle.write("\n")

    def close(self) -> None:
        self.handle.close()


def _nums(values, digits: int = 6) -> list[str]:
    """:func:`_num` of every value of a 1-D array (in a few passes of Python's own formatting).

    With 1 to 10 digits, values from 1e-4 up to 10^(15 - digits) are written as ``"%.{digits}f"`` without its
    trailing zeros (one kept after the point): the same text as ``repr(round(x, digits))``
    there, several times as fast (all of them by one ``%`` of one format string).  Both
    round the exact binary value correctly to ``digits`` places, and ``repr`` of the
    nearest double to a decimal of at most 15 significant digits is that decimal, in
    positional notation from 1e-4 on.  Others go the plain way.
    """
    isfinite = math.isfinite
    array = np.asarray(values, dtype=float)
    floats = array.tolist()
    if not 1 <= digits <= 10:  # a point to strip zeros back to
        return ["" if not isfinite(x) else repr(round(x, digits)) for x in floats]
    texts = ((f"%.{digits}f\n" * len(floats)) % tuple(floats)).split("\n")
    texts.pop()  # after the last line end
    out = [t if t[-1] != "." else t + "0" for t in [t.rstrip("0") for t in texts]]
    with np.errstate(invalid="ignore"):
        size = np.abs(array)
        other = ~((size >= 1e-4) & (size < 10.0 ** (15 - digits)))  # NaN too
    for k in np.flatnonzero(other).tolist():
        x = floats[k]
        out[k] = "" if not isfinite(x) else repr(round(x, digits))
    return out


def _csv_fields(texts) -> dict:
    """Each distinct text of ``texts`` as the csv module writes it as a field of a row
    (quoted where it must be), by text."""
    out = {}
    for text in dict.fromkeys(texts):
        buf = io.StringIO()
        csv.writer(buf, lineterminator="\n").writerow(["", text])
        out[text] = buf.getvalue()[1:-1]  # the leading "," and the line end off
    return out


def _digits_matrix(values, width: int | None = None) -> np.ndarray:
    """Decimal digits of non-negative integers (int64 (n,)), right-aligned in ASCII,
    (n, width) uint8; the places before a number's first digit are 0 bytes (a zero has its
    one digit "0").  ``width``: at least the longest number's digits (default: exactly)."""
    values = np.asarray(values, dtype=np.int64).reshape(-1)
    if width is None:
        width = len(str(int(values.max()))) if values.size else 1
    # place by place from the last, each a row of a (width, n) array (contiguous writes;
    # division by the scalar 10 is numpy's fast integer division)
    out = np.empty((width, values.size), dtype=np.uint8)
    rest = values.astype(np.uint64)
    ten = np.uint64(10)
    for k in range(width - 1, -1, -1):
        quotient = rest // ten
        digit = rest - quotient * ten
        digit += ord("0")
        if k < width - 1:
            digit[rest == 0] = 0  # before the first digit
        out[k] = digit
        rest = quotient
    return out.T


def _int_matrix(values) -> np.ndarray:
    """``str(int(v))`` of each value of an int64 array, as rows of ASCII bytes padded with 0
    bytes, (n, W) uint8."""
    values = np.asarray(values, dtype=np.int64).reshape(-1)
    if values.size and values.min() < 0:
        return _text_matrix([str(v) for v in values.tolist()])
    return _digits_matrix(values)


def _number_matrix(values, digits: int = 6) -> np.ndarray:
    """:func:`_nums` of a float array as rows of ASCII bytes padded with 0 bytes, (n, W) uint8.

    Values from 1e-4 up to 10^(15 - digits) are ``"%.{digits}f"`` without its trailing zeros
    (one kept after the point), as :func:`_nums` writes them, built from integers: the
    value times 10^digits, rounded to the nearest integer (its integer and fraction digits,
    the trailing zeros of the fraction left off).  The product is rounded once, by less
    than half its last place, so the nearest integer to it is the correctly rounded one
    unless the product lies within a few of its last places of a half: those values, like
    the others outside the range, go :func:`_nums`'s own way (for 1 to 10 digits; other
    numbers of digits all do).
    """
    array = np.asarray(values, dtype=float).reshape(-1)
    n = array.size
    if not 1 <= digits <= 10:
        return _text_matrix(_nums(array, digits))
    with np.errstate(invalid="ignore", over="ignore"):
        size = np.abs(array)
        scaled = size * 10.0**digits
        fraction = scaled - np.floor(scaled)
        near_half = np.abs(fraction - 0.5) <= 4.0 * np.spacing(scaled)
        regular = (size >= 1e-4) & (size < 10.0 ** (15 - digits)) & ~near_half  # NaN fails
    whole = np.rint(np.where(regular, scaled, 0.0)).astype(np.int64)
    integer, fraction_digits = np.divmod(whole, 10**digits)
    # the fraction's places, leading zeros included; its trailing zeros but the first as 0 bytes
    frac = _digits_matrix(fraction_digits + 10**digits, digits + 1)[:, 1:]
    shown = np.full(n, digits)
    for k in range(1, digits):
        shown[fraction_digits % 10**k == 0] = digits - k
    frac[np.arange(digits) >= shown[:, None]] = 0
    sign = np.where(array < 0, ord("-"), 0).astype(np.uint8)[:, None]
    point = np.full((n, 1), ord("."), dtype=np.uint8)
    out = np.concatenate([sign, _digits_matrix(integer), point, frac], axis=1)
    other = np.flatnonzero(~regular)
    if other.size:
        block = _text_matrix(_nums(array[other], digits))
        if block.shape[1] > out.shape[1]:
            out = np.concatenate([np.zeros((n, block.shape[1] - out.shape[1]), dtype=np.uint8), out], axis=1)
        out[other] = 0
        out[other, out.shape[1] - block.shape[1]:] = block
    return out


def _text_matrix(texts) -> np.ndarray:
    """Texts (without NUL characters) as rows of UTF-8 bytes padded with 0 bytes, (n, W) uint8."""
    encoded = [t.encode("utf-8") for t in texts]
    width = max([len(b) for b in encoded], default=0) or 1
    return np.array(encoded, dtype=f"S{width}").reshape(len(encoded)).view(np.uint8).reshape(len(encoded), width)


def _joined_rows(matrices) -> str:
    """CSV lines of fields given as byte matrices (n, W_k) padded with 0 bytes: each row's
    fields joined by commas, a line end after each row (the 0 bytes dropped)."""
    n = matrices[0].shape[0]
    comma = np.full((n, 1), ord(","), dtype=np.uint8)
    parts = []
    for m in matrices:
        parts += [m, comma]
    parts[-1] = np.full((n, 1), ord("\n"), dtype=np.uint8)
    joined = np.concatenate(parts, axis=1).reshape(-1)
    return joined[joined != 0].tobytes().decode("utf-8")


def examinees_csv(result: SimulationResult) -> str:
    """Text of ``examinees.csv``."""
    cuts = result.design.reporting.cut_scores
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    # ``n_scored`` (formerly n_items) sits where the first format of this file put
    # the test length; then what this project adds
    w.writerow(["examinee", "true_theta", "theta", "se", "n_scored", "stop_reason", "n_pretest",
                "scaled_score", "seed"] + [f"class_{c.name}" for c in cuts])
    # column by column: the values of a 10,000-examinee run in a few passes.  Numbers never
    # need quotes; the texts (stop reasons, class labels) are few, each written once by the
    # csv module as it writes them in a row
    reasons = [str(r) for r in result.stop_reason]
    labels = [[c.above if v == 1 else c.below if v == 0 else "" for v in result.at_or_above[:, k].tolist()]
              for k, c in enumerate(cuts)]
    field = _csv_fields(reasons + [label for column in labels for label in column])
    if not result.size:
        return buf.getvalue()
    if not any("\0" in text for text in field.values()):
        # every field as a matrix of bytes (digits built by integer arithmetic), the rows
        # joined in one pass: the same text as the way below, several times as fast
        def texts(column):
            distinct = list(dict.fromkeys(column))
            at = {text: k for k, text in enumerate(distinct)}
            return _text_matrix([field[t] for t in distinct])[[at[t] for t in column]]

        buf.write(_joined_rows([
            _int_matrix(np.arange(result.size)), _number_matrix(result.true_theta), _number_matrix(result.theta),
            _number_matrix(result.se), _int_matrix(result.n_scored), texts(reasons), _int_matrix(result.n_pretest),
            _number_matrix(result.scaled_score), _int_matrix(result.seeds), *[texts(column) for column in labels]]))
        return buf.getvalue()

    def ints(values):
        return [str(v) for v in np.asarray(values, dtype=np.int64).tolist()]

    columns = [[str(k) for k in range(result.size)], _nums(result.true_theta), _nums(result.theta),
               _nums(result.se), ints(result.n_scored), [field[r] for r in reasons], ints(result.n_pretest),
               _nums(result.scaled_score), ints(result.seeds), *[[field[x] for x in column] for column in labels]]
    buf.write("\n".join(map(",".join, zip(*columns))))
    buf.write("\n")
    return buf.getvalue()


def items_csv(result: SimulationResult) -> str:
    """Text of ``items.csv``."""
    bank = result.bank
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(["item_id", "exposure_rate", "times_given", "selection_rate", "area", "status"])
    n = max(result.size, 1)
    for i, iid in enumerate(bank.item_ids):
        w.writerow([iid, _num(result.administered[i] / n), int(result.administered[i]),
                    _num(result.offered[i] / n), bank.area[i], bank.status[i]])
    return buf.getvalue()


def rows_csv(rows: list[dict]) -> str:
    """CSV text of a list of flat dicts (columns of the first row, then new ones in order)."""
    cols: list = []
    for r in rows:
        for k in r:
            if k not in cols:
                cols.append(k)
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(cols)
    for r in rows:
        w.writerow(["" if r.get(k) is None else (_num(r[k]) if isinstance(r[k], float) else r[k]) for k in cols])
    return buf.getvalue()


def run_study(design: Design, bank: ItemBank, *, population: Population, out_dir: str | Path | None,
              execution: Execution = Execution(), exposure_target: float | None = None,
              write_administrations: bool = True, title: str = "") -> Study:
    """Check, simulate, summarise and (when ``out_dir`` is given) write the study's files.

    Parameters
    ----------
    population : Population
        The simulated examinees (e.g. ``Population.drawn(parse_ability_spec("normal:0,1"),
        seed=1)``: :data:`DEFAULT_EXAMINEES` of them).
    out_dir : path or None
        Folder for the files (created if needed); None: compute only.
    execution : Execution
        Chunks, workers, executor, progress.
    """
    require_design_fits_bank(design, bank)
    warnings = design_warnings(design, bank)
    true_bank = population.true_bank
    true_item_rows(bank, true_bank)
    exposure_target = metrics.exposure_target(exposure_target)  # checked before any work
    n = population.size
    staging = None
    writer = None
    created = False
    finished = False
    if out_dir is not None:
        out_dir, created = prepare_folder(out_dir)
        staging = StagedFiles(out_dir)
    try:
        if staging is not None and write_administrations:
            writer = _AdministrationWriter(staging.path("administrations.csv"), bank)
        # first items and set follow-ons explain the report's exposure section
        counts = LotteryFreeCounts(design, bank, count_first=True)

        def on_chunk(chunk):
            counts(chunk)
            if writer is not None:
                writer(chunk)

        # a design with ability-conditional exposure parameters is judged stratum by stratum
        strata = design.exposure_strata or None
        result = simulate(design, bank, population=population, execution=execution, on_chunk=on_chunk,
                          count_by_stratum=strata)
        if writer is not None:
            writer.close()
        summary = metrics.summarize(result, exposure_target=exposure_target)
        summary["settings"] = {
            "design": design.source, "bank": bank.name,
            "abilities": None if population.abilities is None else population.abilities.text,
            "true_bank": None if true_bank is None else true_bank.name, "seed": int(population.seed),
            "examinees": int(n), "chunk_size": int(execution.chunk_for(n)), "workers": int(execution.workers),
        }
        conditional = summary["conditional"]
        if staging is not None:
            staging.write_text("summary.json", json.dumps(summary, indent=2, allow_nan=False) + "\n")
            staging.write_text("examinees.csv", examinees_csv(result))
            staging.write_text("items.csv", items_csv(result))
            staging.write_text("conditional.csv", rows_csv(conditional))
            from .html_report import simulation_report_html

            staging.write_text("report.html", simulation_report_html(
                result, summary, title=title, first_counts=counts.first[0], follow_counts=counts.follow[0],
                warnings=warnings))
            written = {p.name for p in staging.commit()}
            for name in FILES:
                if name not in written:
                    # a file of an earlier run that this run did not write (e.g. its
                    # administrations.csv after --no-administrations) would not match the others
                    (out_dir / name).unlink(missing_ok=True)
        finished = True
        return Study(result=result, summary=summary, conditional=conditional, out_dir=out_dir, warnings=warnings)
    finally:
        if writer is not None:
            writer.close()
        if staging is not None:
            staging.discard()
            if created and not finished:
                shutil.rmtree(out_dir, ignore_errors=True)  # a folder made for a failed run


_SE_COLUMNS = {"se_a": "sd_a", "se_b": "sd_b", "se_c": "sd_c", "se_d": "sd_d"}


def read_standard_errors(fit_report: str | Path, bank: ItemBank) -> dict:
    """Per-item standard errors from a calibration fit report, as SDs for perturbation.

    The report is the CSV ``adaptive-engine calibrate --fit-report`` writes (see
    :func:`adaptive_engine.calibration.item_fit.item_report_rows`): a column ``item_id``
    and the standard errors ``se_a``, ``se_b``, ``se_c``, ``se_d`` and ``se_b1`` ...
    ``se_bK`` (category thresholds); other columns are ignored.  An empty cell (a
    parameter the model does not estimate) and an item of the bank the report does not
    list leave that parameter unperturbed.

    Returns
    -------
    dict
        Keyword SDs for :func:`adaptive_engine.simulation.perturbed_bank`: ``sd_a``,
        ``sd_b``, ``sd_c``, ``sd_d`` float (n_items,) and ``sd_thresholds`` float
        (n_items, K) in bank order.

    Raises
    ------
    SimulationError
        Located at ``FILE line N, item ID, COLUMN`` for items not in the bank, repeated
        items and standard errors that are not finite numbers >= 0; at ``fit_report`` when
        the file cannot be read.
    """
    path = Path(fit_report)
    try:
        text = path.read_text(encoding="utf-8-sig")
    except FileNotFoundError:
        raise SimulationError(f"fit report not found: {path}", "fit_report") from None
    except (IsADirectoryError, UnicodeDecodeError) as exc:
        raise SimulationError(f"cannot read the fit report: {exc}", "fit_report") from None
    reader = csv.reader(text.splitlines())
    header = [c.strip() for c in next(reader, [])]
    where = path.name
    if "item_id" not in header:
        raise SimulationError("the fit report has no item_id column", f"{where} line 1")
    thresholds = sorted((int(c[4:]), c) for c in header if c.startswith("se_b") and c[4:].isdigit())
    if not any(c in header for c in _SE_COLUMNS) and not thresholds:
        raise SimulationError("the fit report has no standard-error columns (se_a, se_b, se_c, se_d, se_b1, ...)",
                              f"{where} line 1")
    k_max = bank.thresholds.shape[1]
    if thresholds and thresholds[-1][0] > k_max:
        raise SimulationError(f"column {thresholds[-1][1]} is beyond the bank's {k_max} thresholds",
                              f"{where} line 1")
    n = bank.n_items
    out = {key: np.zeros(n) for key in _SE_COLUMNS.values()}
    out["sd_thresholds"] = np.zeros((n, k_max))
    columns = [(header.index(c), c, key, None) for c, key in _SE_COLUMNS.items() if c in header]
    columns += [(header.index(c), c, "sd_thresholds", k - 1) for k, c in thresholds]
    id_col = header.index("item_id")
    problems: list = []
    seen: dict = {}
    for line_no, row in enumerate(reader, start=2):
        if not any(cell.strip() for cell in row):
            continue
        iid = row[id_col].strip() if id_col < len(row) else ""
        row_index = bank.index_of.get(iid)
        if row_index is None:
            problems.append(Problem(f"{where} line {line_no}, item {iid or '(empty)'}",
                                    "the item is not in the operational bank"))
            continue
        if iid in seen:
            problems.append(Problem(f"{where} line {line_no}, item {iid}",
                                    f"the item is listed again (first on line {seen[iid]})"))
            continue
        seen[iid] = line_no
        for col, name, key, k in columns:
            raw = row[col].strip() if col < len(row) else ""
            if not raw:
                continue  # not estimated for this item's model
            try:
                value = float(raw)
            except ValueError:
                value = math.nan
            if not math.isfinite(value) or value < 0:
                problems.append(Problem(f"{where} line {line_no}, item {iid}, {name}",
                                        f"{raw!r} is not a standard error (a finite number >= 0)"))
                continue
            if k is None:
                out[key][row_index] = value
            else:
                out[key][row_index, k] = value
        if len(problems) >= 20:
            break
    if problems:
        raise SimulationError(problems[:20])
    if not seen:
        raise SimulationError("the fit report lists no items", f"{where}")
    return out


def summary_table(summary: dict) -> str:
    """The headline figures as an aligned two-column text table."""
    keys = ["examinees", "rmse", "bias", "mae", "mean_se", "rmse_to_mean_se", "correlation",
            "marginal_reliability", "mean_length", "max_exposure", "overlap_rate", "chi_square_index",
            "exposure_target", "share_above_target"]
    keys += [k for k in summary if k.startswith("accuracy_")]
    lines = []
    for k in keys:
        v = summary.get(k)
        text = "-" if v is None else (f"{v:.4f}" if isinstance(v, float) else str(v))
        lines.append(f"{k:<22} {text:>10}")
    reasons = summary.get("length", {}).get("stop_reasons", {})
    if reasons:
        lines.append("stop reasons           " + ", ".join(f"{r} {c}" for r, c in reasons.items()))
    return "\n".join(lines)
