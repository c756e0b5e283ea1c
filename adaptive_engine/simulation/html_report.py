"""Self-contained HTML reports of simulation studies and tuning runs.

The study page explains itself: which design was simulated (its file name and the
plain-words description ``design check`` prints), the headline figures with readable
labels and units, then one section each for test length, precision, exposure and
classification, a section on the content areas and the bank, and a short glossary.
Conditional plots show how many examinees each ability bin holds, and mark bins too thin
to trust (fewer than :data:`THIN_BIN` examinees).  Exposure is shown so that the
over-exposed items stand out (sorted rates against the target, and a table of the items
above it), with a sentence saying whether the target is met and, when it is not, where the
exposure comes from where that can be known (the opening's first-item rule, item sets,
small content areas, the exposure method).

The figures are inline SVG written by :mod:`adaptive_engine.simulation.svg_chart` (no
plotting library: a page's figures take milliseconds).  Pages load nothing from the
network (inline CSS and figures), and every table and figure fits a window 1024 px wide
(checked in headless Chromium by ``tests/test_report_pages.py``).
"""

from __future__ import annotations

import html
import math

import numpy as np

from .svg_chart import Chart

#: Bins with fewer examinees are marked as thin on conditional plots and tables (common
#: practice: below about 30 cases a bin's RMSE or share moves by several points from one
#: sample to the next).
THIN_BIN = 30

#: Items above the exposure target listed in the report's table (all are in items.csv).
MAX_LISTED_ITEMS = 25

_STYLE = """
*,*::before,*::after{box-sizing:border-box}
body{font-family:system-ui,-apple-system,'Segoe UI',sans-serif;margin:0 auto;padding:1em 1.5em 3em;
max-width:62em;color:#222;line-height:1.45}
h1{font-size:1.55em;margin-bottom:.2em} h2{font-size:1.25em;border-bottom:1px solid #ddd;
padding-bottom:.15em;margin-top:1.8em} h3{font-size:1.05em;margin-bottom:.3em}
table{border-collapse:collapse;margin:.4em 0 1.2em;font-size:.9em;max-width:100%}
td,th{border:1px solid #ccc;padding:.2em .5em;text-align:right;vertical-align:top}
td{white-space:nowrap} th{background:#f0f0f0;font-weight:600}
td.l,th.l{text-align:left} td.l{white-space:normal}
tr.thin td{color:#777;font-style:italic}
figure{margin:.6em 0 1.6em;max-width:100%} figure svg{display:block;max-width:100%;height:auto}
figcaption{color:#444;font-size:.9em;max-width:44em}
p,li,dd{max-width:48em} code{overflow-wrap:anywhere}
.note{color:#555}
.box{padding:.5em .8em;margin:.6em 0 1em;border-left:4px solid}
.warn{background:#fff6e6;border-color:#e69500} .miss{background:#fdeceb;border-color:#c62828}
.ok{background:#eaf5ea;border-color:#2e7d32}
dl.design{margin:.4em 0 1em} dl.design dt{font-weight:600;margin-top:.3em} dl.design dd{margin:0 0 0 1.2em}
dl.glossary dt{font-weight:600;margin-top:.5em} dl.glossary dd{margin:0 0 0 1.2em}
"""

_TARGET_COLOUR = "#c62828"
_BLUE = "#3a6ea5"


# ----------------------------------------------------------------------------------------
# formatting


def esc(x) -> str:
    """Text made safe inside HTML (quotes included)."""
    return html.escape(str(x))


def fmt(v, digits: int = 3) -> str:
    """A cell: dashes for missing values, ``digits`` decimals for floats."""
    if v is None:
        return "&ndash;"
    if isinstance(v, bool):
        return "yes" if v else "no"
    if isinstance(v, (float, np.floating)):
        return "&ndash;" if not math.isfinite(v) else f"{v:.{digits}f}"
    return esc(v)


def pct(v, digits: int = 1) -> str:
    """A share as a percentage with ``digits`` decimals; a dash when missing."""
    if v is None or not math.isfinite(v):
        return "&ndash;"
    return f"{100 * v:.{digits}f}%"


def table_html(rows: list[dict], columns: list[str] | None = None, *, labels: dict | None = None,
               text=(), row_class=None) -> str:
    """An HTML table of flat dicts.

    The first column and the ``text`` columns are left-aligned and wrap; the others hold
    figures (right-aligned, kept on one line).  ``labels`` maps a key to its column
    heading; ``row_class(row)`` may give a CSS class per row (e.g. ``thin``).  Cells
    already formatted as HTML are passed as :class:`Html` values.
    """
    if not rows:
        return "<p class='note'>(none)</p>"
    cols = columns or list(dict.fromkeys(k for r in rows for k in r))
    labels = labels or {}
    left = [j == 0 or c in text for j, c in enumerate(cols)]
    head = "".join(f"<th{' class=l' if left[j] else ''}>{_breakable(labels.get(c, c))}</th>"
                   for j, c in enumerate(cols))
    body = []
    for r in rows:
        cls = row_class(r) if row_class else None
        cells = "".join(f"<td{' class=l' if left[j] else ''}>{_cell(r.get(c))}</td>" for j, c in enumerate(cols))
        body.append(f"<tr{f' class={cls}' if cls else ''}>{cells}</tr>")
    return f"<table><thead><tr>{head}</tr></thead><tbody>{''.join(body)}</tbody></table>"


def _breakable(label) -> str:
    """A heading that may wrap after dots and underscores (long design keys such as
    ``stopping.sprt.indifference`` would otherwise widen their column)."""
    return esc(label).replace(".", ".<wbr>").replace("_", "_<wbr>")


class Html(str):
    """A table cell that is already HTML (not escaped again)."""


def _cell(v) -> str:
    return str(v) if isinstance(v, Html) else fmt(v)


def figure_html(caption: str, svg: str) -> str:
    """A figure: the chart (inline SVG) and its caption."""
    return f"<figure>{svg}<figcaption>{esc(caption)}</figcaption></figure>"


def page_start(title: str) -> str:
    """The start of a report page: head with the inline style, and the title as heading."""
    return (f"<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'>"
            f"<meta name='viewport' content='width=device-width, initial-scale=1'><title>{esc(title)}</title>"
            f"<style>{_STYLE}</style></head><body><h1>{esc(title)}</h1>")


def contents_line(what: str, nav: list[tuple[str, str]]) -> str:
    """The line under a study page's title: what the page is about and links to its sections."""
    return (f"<p class='note'>{what} Sections: "
            + " &middot; ".join(f"<a href='#{a}'>{b}</a>" for a, b in nav) + "</p>")


def glossary_html(entries=(), extra=()) -> str:
    """The glossary section: ``entries`` (term, meaning) pairs, then ``extra`` ones."""
    return ("<h2 id='glossary'>Glossary</h2><dl class='glossary'>"
            + "".join(f"<dt>{esc(a)}</dt><dd>{esc(b)}</dd>" for a, b in (*entries, *extra)) + "</dl>")


# ----------------------------------------------------------------------------------------
# labels and glossary

#: Headline keys of summary.json -> (label, how the value is shown).
HEADLINE_LABELS = {
    "examinees": "Simulated examinees",
    "mean_length": "Mean test length",
    "rmse": "RMSE of the final estimate",
    "bias": "Bias of the final estimate",
    "mae": "Mean absolute error",
    "mean_se": "Mean reported standard error",
    "rmse_to_mean_se": "RMSE / mean SE",
    "correlation": "Correlation of estimate and true ability",
    "marginal_reliability": "Marginal reliability",
    "max_exposure": "Largest exposure rate",
    "share_above_target": "Items above the exposure target",
    "share_never_used": "Items never given",
    "overlap_rate": "Test overlap rate",
    "chi_square_index": "Chi-square index of exposure",
}

GLOSSARY = (
    ("theta units", "the ability scale of the item bank; with a standard normal population one unit is one "
                    "standard deviation of ability"),
    ("RMSE", "root mean squared error: the typical distance between the final estimate and the simulated "
             "true ability, in theta units (smaller is better)"),
    ("bias", "the mean of estimate minus true ability: positive when estimates run high"),
    ("standard error (SE)", "the uncertainty the engine reports with each estimate"),
    ("RMSE / mean SE", "near 1 when the reported standard errors are honest; above 1 they understate the "
                       "real error, below 1 they overstate it (summary.json: rmse_to_mean_se)"),
    ("marginal reliability", "the share of the variance of the estimates that is true-ability variance "
                             "(0 to 1, higher is better)"),
    ("exposure rate", "the share of examinees who were given an item; the exposure target is the rate no "
                      "operational item should exceed (--exposure-target, default 0.25)"),
    ("test overlap rate", "the share of a test that two examinees have in common on average"),
    ("chi-square index", "how unevenly the items are used: 0 when every item is given equally often "
                         "(Chang & Ying 1999)"),
    ("classification accuracy", "the share of examinees classified on the same side of a cut score as their "
                                "true ability"),
    ("false pass / false fail", "examinees classified at or above the cut although truly below it, and the "
                                "reverse"),
    ("thin bin", f"an ability bin with fewer than {THIN_BIN} simulated examinees: its figures are rough and are "
                 "shown hollow or in grey"),
)


def glossary_entries(*terms: str) -> list[tuple[str, str]]:
    """The :data:`GLOSSARY` entries of ``terms``, in the glossary's order."""
    return [(a, b) for a, b in GLOSSARY if a in terms]


def _stop_reason_meanings() -> dict:
    from ..kernel.stopping import STOP_REASONS

    return STOP_REASONS


# ----------------------------------------------------------------------------------------
# figures


def _bars_width(x) -> float:
    x = np.unique(np.asarray(x, dtype=float))
    return 0.8 * float(np.min(np.diff(x))) if x.size > 1 else 0.4


def _conditional_figure(x, n, series, *, ylabel: str, title: str, description: str, cut=None, hline=None,
                        ylim=None, xlabel: str = "true ability (theta)") -> str:
    """Lines over true ability with a panel of examinees per bin beneath; thin bins hollow.

    ``series``: (label, values, marker, colour) tuples; ``cut``: (theta, label) marked by
    a vertical line.
    """
    x = np.asarray(x, dtype=float)
    n = np.asarray(n, dtype=float)
    thin = n < THIN_BIN
    chart = Chart(xlabel, title=title)
    top = chart.panel(230, ylabel, ylim=ylim)
    counts = chart.panel(70, "examinees", integer_y=True)
    if hline is not None:
        top.hline(hline, colour="#888888", width=0.8)
    for label, values, marker, colour in series:
        top.line(x, values, colour=colour, label=label, marker=marker or None, hollow=thin)
    if cut is not None:
        top.vline(cut[0], colour=_TARGET_COLOUR, dash="5 3", width=1.2, label=cut[1])
        counts.vline(cut[0], colour=_TARGET_COLOUR, dash="5 3", width=1.2)
    if thin.any():
        top.legend_entry(f"hollow: fewer than {THIN_BIN} examinees", colour="#888888", hollow=True)
    counts.bars(x, n, width=_bars_width(x), colours=np.where(thin, "#e69500", "#999999"))
    return chart.svg(description)


def _length_histogram(n_scored, *, min_items: int, max_items: int, description: str) -> str:
    n_scored = np.asarray(n_scored, dtype=int)
    lo, hi = (int(n_scored.min()), int(n_scored.max())) if n_scored.size else (0, 1)
    values = np.arange(lo, hi + 1)
    counts = np.bincount(n_scored - lo, minlength=values.size) if n_scored.size else np.zeros(values.size)
    chart = Chart("scored items per test", integer_x=True,
                  xlim=(min(lo, min_items) - 1, max(hi, max_items) + 1))
    panel = chart.panel(220, "examinees", integer_y=True)
    panel.bars(values, counts, width=1.0, colours=_BLUE)
    bounds = ({min_items: f"minimum and maximum ({min_items})"} if min_items == max_items
              else {min_items: f"minimum ({min_items})", max_items: f"maximum ({max_items})"})
    for value, label in bounds.items():
        panel.vline(value, colour="#555555", dash="2 3", note=label)
    return chart.svg(description)


def exposure_figure(rates, target: float, description: str) -> str:
    """Operational items' exposure rates, most exposed first, against the target."""
    r = np.sort(np.asarray(rates, dtype=float))[::-1]
    k = int(np.sum(r > target))
    # bars of width 1 side by side, drawn as one filled step outline per colour (one shape
    # each, however large the bank); the rates are sorted, so the items above the target
    # come first
    edges = np.arange(r.size + 1) + 0.5
    chart = Chart("operational items, most exposed first", xlim=(0, r.size + 1))
    panel = chart.panel(260, "exposure rate (share of examinees)",
                        ylim=(0, max(1e-3, float(r.max()) if r.size else 1.0, target) * 1.08))
    panel.filled_steps(edges[: k + 1], r[:k], colour=_TARGET_COLOUR, label=f"above the target ({k} items)")
    panel.filled_steps(edges[k:], r[k:], colour=_BLUE, label=f"at or below ({r.size - k} items)")
    panel.hline(target, colour="#000000", dash="5 3", width=1.2, label=f"exposure target {target:g}")
    unused = int(np.sum(r == 0))
    if unused:  # a band beneath the bars
        panel.vspan(r.size - unused + 0.5, r.size + 0.5, colour="#eeeeee", label=f"never given ({unused} items)")
    return chart.svg(description)


def _information_figure(bank, description: str) -> str:
    from ..irt import models

    operational = np.flatnonzero(np.asarray(bank.status) == "operational")
    grid = np.linspace(-4, 4, 161)
    info = np.zeros(grid.size)
    for start in range(0, operational.size, 4096):  # bounded temporaries for large banks
        chunk = bank.params.take(operational[start : start + 4096])
        info += models.information(*models.outer(chunk, grid)).sum(axis=0)
    chart = Chart("ability (theta)")
    chart.panel(250, "information of all operational items").line(grid, info, colour="#000000", width=1.5)
    return chart.svg(description)


# ----------------------------------------------------------------------------------------
# the study page


def _ability_bins_for(true_theta, width: float = 0.25):
    from .metrics import ability_bins

    edges = np.round(np.arange(-3.0, 3.0 + width / 2, width), 10)
    return ability_bins(true_theta, edges)


def classification_curve(true_theta, at_or_above) -> list[dict]:
    """Share classified at or above a cut by true ability.

    Bins are 0.25 wide from -3 to 3 with open outer bins, or one per grid point when at
    most 41 distinct abilities occur (a ``grid:`` study; :func:`metrics.ability_bins`).

    Parameters
    ----------
    true_theta : float (N,)
    at_or_above : int (N,)
        1 at or above the cut, 0 below, -1 no label (counted as not at or above).

    Returns
    -------
    list of dict
        ``theta`` (bin centre), ``n``, ``share_at_or_above`` per non-empty bin.
    """
    true_theta = np.asarray(true_theta, dtype=float)
    label = np.asarray(at_or_above)
    bin_of, _, centres = _ability_bins_for(true_theta)
    rows = []
    for b in range(centres.size):
        sel = bin_of == b
        if sel.any():
            rows.append({"theta": float(centres[b]), "n": int(sel.sum()),
                         "share_at_or_above": float(np.mean(label[sel] == 1))})
    return rows


def design_section(result, summary, warnings) -> list[str]:
    from ..design.bank_fit import describe_design

    design, bank = result.design, result.bank
    settings = summary.get("settings", {})
    n_op = int(np.sum(np.asarray(bank.status) == "operational"))
    parts = ["<h2 id='design'>The design</h2>",
             f"<p>Design file <code>{esc(design.source or '(built in code)')}</code> on the bank "
             f"<code>{esc(bank.name or '(unnamed)')}</code> ({bank.n_items} items: {n_op} operational, "
             f"{bank.n_items - n_op} pretest). In plain words (as <code>adaptive-engine design check</code> "
             "prints it):</p><dl class='design'>"]
    for line in describe_design(design):
        head, _, rest = line.partition(": ")
        parts.append(f"<dt>{esc(head)}</dt><dd>{esc(rest)}</dd>")
    parts.append("</dl>")
    if warnings:
        parts.append("<div class='box warn'><b>Worth a look</b> (the design runs, but):<ul>"
                     + "".join(f"<li>{esc(w.location)}: {esc(w.message)}</li>" for w in warnings)
                     + "</ul></div>")
    who = settings.get("abilities")
    parts.append(f"<p class='note'>{summary.get('examinees')} simulated examinees"
                 + (f", true abilities {esc(who)}" if who else "")
                 + f", seed {summary.get('seed', settings.get('seed'))}"
                 + (f"; answers drawn from the bank <code>{esc(settings['true_bank'])}</code>"
                    if settings.get("true_bank") else "") + ".</p>")
    return parts


def _headline_section(summary) -> list[str]:
    expo = summary["exposure"]
    target = expo.get("exposure_target")
    rows = [
        ("examinees", f"{summary['examinees']:,}"),
        ("mean_length", f"{fmt(summary.get('mean_length'), 1)} scored items"),
        ("rmse", f"{fmt(summary.get('rmse'))} theta units"),
        ("bias", f"{fmt(summary.get('bias'))} theta units"),
        ("mean_se", f"{fmt(summary.get('mean_se'))} theta units"),
        ("rmse_to_mean_se", fmt(summary.get("rmse_to_mean_se"), 2)),
        ("correlation", fmt(summary.get("correlation"))),
        ("marginal_reliability", fmt(summary.get("marginal_reliability"))),
        ("max_exposure", f"{pct(summary.get('max_exposure'))} of examinees (target {pct(target, 0)})"),
        ("share_above_target", f"{pct(summary.get('share_above_target'))} of the operational items"),
        ("share_never_used", f"{pct(expo.get('share_never_used'))} of the operational items"),
        ("overlap_rate", f"{pct(summary.get('overlap_rate'))} of a test shared by two examinees"),
    ]
    out = [{"figure": HEADLINE_LABELS[k], "value": Html(v)} for k, v in rows]
    for c in summary.get("classification", []):
        out.append({"figure": f"Classification accuracy at the cut {c['cut']!r}",
                    "value": Html(f"{pct(c['accuracy'])} of examinees")})
    return ["<h2 id='glance'>At a glance</h2>",
            table_html(out, ["figure", "value"], labels={"figure": "Figure", "value": "Value"}),
            "<p class='note'>Terms are explained in the <a href='#glossary'>glossary</a> at the end.</p>"]


def stop_reasons_and_length_figure(result, stop_reasons: dict, *, meanings: dict | None = None) -> list[str]:
    """The table of why tests stopped and the figure of the length distribution.

    ``meanings`` replaces the stop reasons' meanings it names (e.g. for an ability vector).
    """
    design = result.design
    meanings = {**_stop_reason_meanings(), **(meanings or {})}
    n = max(result.size, 1)
    reasons = [{"reason": k, "meaning": meanings.get(k, ""), "examinees": v, "share": Html(pct(v / n))}
               for k, v in sorted(stop_reasons.items(), key=lambda kv: -kv[1])]
    caption = "Distribution of the test length (scored items)"
    return ["<h3>Why tests stopped</h3>",
            table_html(reasons, ["reason", "meaning", "examinees", "share"], text=("meaning",),
                       labels={"reason": "Stop reason", "meaning": "Meaning", "examinees": "Examinees",
                               "share": "Share"}),
            figure_html(caption, _length_histogram(result.n_scored, min_items=design.stopping.min_items,
                                               max_items=design.stopping.max_items, description=caption))]


def _length_section(result, summary) -> list[str]:
    length = summary["length"]
    design = result.design
    rows = [
        {"figure": "Mean (SD)", "value": Html(f"{fmt(length['mean_length'], 1)} ({fmt(length['sd_length'], 1)})")},
        {"figure": "Shortest / longest", "value": Html(f"{length['min_length']} / {length['max_length']}")},
        {"figure": "Percentiles 5, 25, 50, 75, 95",
         "value": Html(", ".join(fmt(v, 0) for v in length["length_percentiles"].values()))},
        {"figure": f"Tests that ran to the maximum ({design.stopping.max_items})",
         "value": Html(pct(length["share_at_max_items"]))},
    ]
    parts = ["<h2 id='length'>Test length</h2>",
             "<p>Scored items per test (pretest items are given besides and not counted).</p>",
             table_html(rows, ["figure", "value"], labels={"figure": "Figure", "value": "Scored items"}),
             *stop_reasons_and_length_figure(result, length["stop_reasons"])]
    cond = [r for r in summary["conditional"] if r["theta"] is not None]
    if cond:
        caption = "Mean test length against true ability; the panel beneath counts the examinees per bin"
        parts.append(figure_html(caption, _conditional_figure(
            [r["theta"] for r in cond], [r["n"] for r in cond],
            [("mean scored items", [r["mean_length"] for r in cond], "o", _BLUE)],
            ylabel="mean scored items", title="Test length by ability", description=caption)))
    return parts


def _conditional_rows(conditional: list[dict]) -> tuple[list[dict], list[str], dict]:
    rows = []
    acc = [k for k in (conditional[0] if conditional else {}) if k.startswith("accuracy_")]
    for r in conditional:
        row = {"bin": r["bin"], "n": r["n"], "bias": r["bias"], "rmse": r["rmse"], "mean_se": r["mean_se"],
               "rmse_to_mean_se": r["rmse_to_mean_se"], "mean_length": Html(fmt(r["mean_length"], 1))}
        for k in acc:
            row[k] = Html(pct(r[k])) if r.get(k) is not None else None
        rows.append(row)
    labels = {"bin": "True ability", "n": "Examinees", "bias": "Bias", "rmse": "RMSE", "mean_se": "Mean SE",
              "rmse_to_mean_se": "RMSE / mean SE", "mean_length": "Mean length"}
    labels.update({k: f"Accuracy ({k[len('accuracy_'):]})" for k in acc})
    return rows, ["bin", "n", "bias", "rmse", "mean_se", "rmse_to_mean_se", "mean_length", *acc], labels


def _precision_section(summary) -> list[str]:
    p = summary["precision"]
    rows = [
        {"figure": "RMSE", "value": p["rmse"]}, {"figure": "Bias", "value": p["bias"]},
        {"figure": "Mean absolute error", "value": p["mae"]}, {"figure": "Mean reported SE", "value": p["mean_se"]},
        {"figure": "RMSE / mean SE", "value": p["rmse_to_mean_se"]},
        {"figure": "Correlation of estimate and true ability", "value": p["correlation"]},
        {"figure": "Marginal reliability", "value": p["marginal_reliability"]},
    ]
    parts = ["<h2 id='precision'>Precision</h2>",
             "<p>How close the final estimates come to the simulated true abilities (theta units).</p>",
             table_html(rows, ["figure", "value"], labels={"figure": "Figure", "value": "Value"})]
    if p.get("n_no_estimate"):
        parts.append(f"<p class='note'>{p['n_no_estimate']} examinee(s) ended without a finite estimate and are "
                     "left out of these figures.</p>")
    return parts + precision_by_ability(summary["conditional"])


def precision_by_ability(conditional: list[dict], *, ability: str = "true ability", heading: str = "By true ability",
                         title: str = "Precision by ability") -> list[str]:
    """The figure of RMSE, bias and mean SE by bin of true ability, and the table of the bins.

    ``conditional``: rows of :func:`adaptive_engine.simulation.metrics.conditional`;
    ``ability`` names the binned ability in the caption and the x axis.
    """
    parts = []
    cond = [r for r in conditional if r["theta"] is not None]
    if cond:
        caption = (f"RMSE, bias and mean reported SE against {ability}; hollow points rest on fewer than "
                   f"{THIN_BIN} examinees (the panel beneath counts them)")
        parts.append(figure_html(caption, _conditional_figure(
            [r["theta"] for r in cond], [r["n"] for r in cond],
            [("RMSE", [r["rmse"] for r in cond], "o", _BLUE),
             ("bias", [r["bias"] for r in cond], "s", "#2e7d32"),
             ("mean SE", [r["mean_se"] for r in cond], "^", "#e69500")],
            ylabel="theta units", title=title, hline=0.0, description=caption,
            xlabel=f"{ability} (theta)")))
    rows, cols, labels = _conditional_rows(conditional)
    labels["bin"] = ability[0].upper() + ability[1:]
    thin = sum(1 for r in rows if r["n"] < THIN_BIN)
    parts += [f"<h3>{esc(heading)}</h3>",
              table_html(rows, cols, labels=labels, row_class=lambda r: "thin" if r["n"] < THIN_BIN else None)]
    if thin:
        parts.append(f"<p class='note'>Rows in grey italics are thin bins: fewer than {THIN_BIN} examinees.</p>")
    return parts


def _exposure_story(result, summary, first_counts, follow_counts) -> list[str]:
    """Sentences on whether the exposure target is met, and where the exposure comes from."""
    from .exposure_diagnosis import area_floors, first_item_candidates

    design, bank = result.design, result.bank
    expo = summary["exposure"]
    target = expo["exposure_target"]
    n = max(result.size, 1)
    operational = np.asarray(bank.status) == "operational"
    rates = result.administered / n
    over = np.flatnonzero(operational & (rates > target))
    over = over[np.argsort(-rates[over], kind="stable")]
    n_op = int(operational.sum())
    never = expo.get("share_never_used")
    out = []
    if not over.size:
        out.append(f"<div class='box ok'>The exposure target is met: no operational item is given to more than "
                   f"{pct(target, 0)} of the examinees (the largest rate is {pct(expo['max_exposure'])}).</div>")
    else:
        top = over[0]
        out.append(f"<div class='box miss'><b>The exposure target of {pct(target, 0)} is missed.</b> "
                   f"{over.size} of the {n_op} operational items ({pct(over.size / max(n_op, 1))}) are given to "
                   f"more than {pct(target, 0)} of the examinees; the most exposed, "
                   f"<code>{esc(bank.item_ids[top])}</code>, to {pct(rates[top])}.</div>")
        se = math.sqrt(target * (1 - target) / n)
        if rates[top] <= target + 3 * se:
            out.append(f"<p>Every excess is within simulation noise: a rate estimated from {n:,} examinees has a "
                       f"standard error of about {se:.3f} ({pct(se)}), and the largest of many rates lies a few "
                       "of them above the true largest one. Simulate more examinees to tell.</p>")
        why = []
        method = design.exposure.method
        if first_counts is not None:
            first_rate = first_counts / n
            openers = [i for i in over if first_rate[i] >= 0.25 * rates[i]]
            if openers:
                k_first = first_item_candidates(design)
                names = ", ".join(f"<code>{esc(bank.item_ids[i])}</code> ({pct(first_rate[i])})" for i in openers[:6])
                start = ("a random starting ability" if design.opening.random_theta is not None
                         else f"theta {design.opening.theta:g}")
                if k_first > 1:
                    how = (f"draws its first item among the {k_first} most informative items there, so each of "
                           f"them opens about 1/{k_first} of the tests")
                elif design.exposure.method == "none":
                    how = "gives the most informative item there first, so the tests open alike"
                else:
                    how = "picks its first item among the few items most informative there"
                why.append(f"<li><b>The first item.</b> Every test opens at {start} and {how}: {names} "
                           "(share of examinees who got it first). More first-item candidates "
                           "([opening] first_item_candidates) spread the opening.</li>")
        if follow_counts is not None and design.blueprint.item_sets:
            sets = []
            for name in dict.fromkeys(str(bank.item_set[i]) for i in over if bank.item_set[i]):
                members = np.flatnonzero(np.asarray(bank.item_set) == name)
                entered = float(rates[members].max())
                listed = ", ".join(f"<code>{esc(bank.item_ids[m])}</code>" for m in members)
                sets.append(f"{esc(name)} ({listed}): entered by {pct(entered)}")
            if sets:
                why.append("<li><b>Item sets.</b> Once a test enters an item set, all its items are given, so every "
                           "member is given as often as the set is entered: " + "; ".join(sets) + ".</li>")
        floors = {a: f for a, f in area_floors(design, bank).items() if f[0] > target}
        for area, (floor, size, minimum) in floors.items():
            why.append(f"<li><b>A small content area.</b> Area <code>{esc(area)}</code> has {size} operational "
                       f"items and a minimum of {minimum} per test, so its items are given to at least "
                       f"{pct(floor)} of the examinees on average.</li>")
        method_words = {
            "none": "The design has no exposure control: the selection criterion gives the same most informative "
                    "items to most examinees.",
            "randomesque": f"Randomesque exposure control draws among the {design.exposure.candidates} best items "
                           "at each step, which spreads exposure only among items of similar information.",
            "progressive": "Progressive selection adds a random part that fades as the test goes on, so the late "
                           "items concentrate on the most informative ones.",
            "sympson_hetter": "The Sympson-Hetter parameters hold only for the design, bank, population and target "
                              "they were calibrated for; calibrate them again for this study's target.",
        }
        text = method_words.get(method)
        if text:
            if method != "sympson_hetter":
                text += (" Sympson-Hetter parameters calibrated for this target hold every item near it: "
                         f"<code>adaptive-engine exposure calibrate {esc(design.source or 'DESIGN')} --bank BANK "
                         f"--target {target:g} --out PARAMETERS.csv</code>.")
            why.append(f"<li><b>Exposure control.</b> {text}</li>")
        if why:
            out.append("<p>Where the exposure comes from:</p><ul>" + "".join(why) + "</ul>")
    if never:
        out.append(f"<p>{pct(never, 0)} of the operational items were never given to any examinee.</p>")
    return out


def _exposure_section(result, summary, first_counts, follow_counts) -> list[str]:
    expo = summary["exposure"]
    target = expo["exposure_target"]
    bank = result.bank
    n = max(result.size, 1)
    operational = np.asarray(bank.status) == "operational"
    rates = result.administered / n
    rows = [
        {"figure": "Largest exposure rate", "value": Html(pct(expo["max_exposure"]))},
        {"figure": "Mean exposure rate", "value": Html(pct(expo["mean_exposure"]))},
        {"figure": "Exposure target", "value": Html(pct(target, 0))},
        {"figure": "Operational items above the target", "value": Html(pct(expo["share_above_target"]))},
        {"figure": "Operational items never given", "value": Html(pct(expo["share_never_used"]))},
        {"figure": "Test overlap rate", "value": Html(pct(expo["overlap_rate"]))},
        {"figure": "Chi-square index of exposure", "value": Html(fmt(expo["chi_square_index"], 1))},
    ]
    parts = ["<h2 id='exposure'>Exposure</h2>",
             "<p>The exposure rate of an item is the share of examinees who were given it (operational items only: "
             "pretest items are seeded at random).</p>",
             *_exposure_story(result, summary, first_counts, follow_counts),
             table_html(rows, ["figure", "value"], labels={"figure": "Figure", "value": "Value"})]
    caption = "Exposure rates of the operational items, most exposed first, against the target"
    parts.append(figure_html(caption, exposure_figure(rates[operational], target, caption)))
    over = np.flatnonzero(operational & (rates > target))
    over = over[np.argsort(-rates[over], kind="stable")]
    if over.size:
        table = []
        for i in over[:MAX_LISTED_ITEMS]:
            row = {"item": str(bank.item_ids[i]), "area": str(bank.area[i]), "set": str(bank.item_set[i]) or None,
                   "rate": Html(pct(rates[i]))}
            if first_counts is not None:
                row["first"] = Html(pct(first_counts[i] / n))
            if follow_counts is not None and bank.item_set[i]:
                row["follow"] = Html(pct(follow_counts[i] / n))
            table.append(row)
        cols = ["item", "area", "set", "rate"] + (["first"] if first_counts is not None else [])
        if follow_counts is not None and any(bank.item_set[i] for i in over):
            cols.append("follow")
        parts += [f"<h3>Items above the target ({over.size})</h3>",
                  table_html(table, cols, text=("area", "set"),
                             labels={"item": "Item", "area": "Area", "set": "Item set", "rate": "Exposure rate",
                                     "first": "Given as first item", "follow": "Given as a set follow-on"})]
        if over.size > MAX_LISTED_ITEMS:
            parts.append(f"<p class='note'>The {MAX_LISTED_ITEMS} most exposed are listed; items.csv has every "
                         "item's rate.</p>")
    if expo.get("by_stratum"):
        parts += exposure_by_stratum_parts(expo["by_stratum"], "true ability")
    return parts


def exposure_by_stratum_parts(by_stratum: list[dict], scale: str) -> list[str]:
    """The table of exposure within strata (``summary["exposure"]["by_stratum"]``) of
    ``scale`` (``"true ability"``, or the true composite of an ability vector)."""
    strata = [{"from": s["theta_from"], "to": s["theta_to"], "n": s["examinees"],
               "max": Html(pct(s["max_exposure"])), "above": Html(pct(s["share_above_target"]))}
              for s in by_stratum]
    return [f"<h3>Within strata of {esc(scale)}</h3>",
            f"<p class='note'>The design's exposure parameters are conditional on ability: the rates within "
            f"each stratum of {esc(scale)}.</p>",
            table_html(strata, ["from", "to", "n", "max", "above"],
                       labels={"from": f"{esc(scale[0].upper() + scale[1:])} from", "to": "to", "n": "Examinees",
                               "max": "Largest exposure rate", "above": "Items above the target"})]


def _classification_section(result, summary) -> list[str]:
    classes = summary.get("classification") or []
    if not classes:
        return []
    return classification_parts(classes, result.design.reporting.cut_scores, result.true_theta, result.at_or_above,
                                intro="<p>Each examinee is classified at or above a cut score, or below it, by the "
                                      "final estimate (or the SPRT's decision); the simulation knows on which side "
                                      "the true ability lies.</p>")


def classification_parts(classes: list[dict], cuts, true_theta, at_or_above, *, intro: str,
                         ability: str = "true ability") -> list[str]:
    """The classification section: its table and a curve per cut score.

    ``classes``: :func:`adaptive_engine.simulation.metrics.classification` rows;
    ``true_theta`` (N,) what is classified, ``at_or_above`` (N, cuts) the labels;
    ``intro`` (HTML) says what is classified and how.
    """
    rows = []
    for c in classes:
        rows.append({"cut": c["cut"], "theta": c["cut_theta"], "accuracy": Html(pct(c["accuracy"])),
                     "false_pass": Html(f"{pct(c['false_pass_rate'])} ({pct(c['false_pass_among_truly_below'])})"),
                     "false_fail": Html(f"{pct(c['false_fail_rate'])} ({pct(c['false_fail_among_truly_above'])})"),
                     "none": Html(pct(c["share_without_label"]))})
    parts = ["<h2 id='classification'>Classification</h2>", intro,
             table_html(rows, ["cut", "theta", "accuracy", "false_pass", "false_fail", "none"],
                        labels={"cut": "Cut score", "theta": "Cut (theta)", "accuracy": "Accuracy",
                                "false_pass": "False pass: of all (of truly below)",
                                "false_fail": "False fail: of all (of truly above)", "none": "Without a class"})]
    for k, cut in enumerate(cuts):
        curve = classification_curve(true_theta, np.asarray(at_or_above)[:, k])
        if not curve:
            continue
        x = [r["theta"] for r in curve]
        share = [r["share_at_or_above"] for r in curve]
        truth = [float(t >= cut.theta) for t in x]
        acc = [s if t >= cut.theta else 1 - s for s, t in zip(share, x)]
        caption = (f"Probability of being classified '{cut.above}' against {ability}, with the accuracy in each "
                   f"bin; the dashed line marks the cut '{cut.name}' at theta {cut.theta:g}")
        parts.append(figure_html(caption, _conditional_figure(
            x, [r["n"] for r in curve],
            [(f"P(classified {cut.above})", share, "o", _BLUE),
             ("accuracy", acc, "s", "#2e7d32"),
             ("truly at or above the cut", truth, "", "#bbbbbb")],
            ylabel="share of examinees", title=f"Classification at the cut '{cut.name}'",
            cut=(cut.theta, f"cut {cut.name} (theta {cut.theta:g})"), ylim=(-0.03, 1.03), description=caption,
            xlabel=f"{ability} (theta)")))
    return parts


def _content_section(summary) -> list[str]:
    content = summary.get("content") or []
    if not content:
        return []
    rows = []
    for c in content:
        rule = ""
        if "rule_min" in c:
            rule = f"{c['rule_min']}" + (f" to {c['rule_max']}" if c.get("rule_max") is not None else " or more")
        rows.append({"area": c["area"], "rule": rule or None, "mean": Html(fmt(c["mean"], 1)),
                     "range": Html(f"{c['min']} to {c['max']}" if c["min"] is not None else "&ndash;"),
                     "within": Html(pct(c["share_within_rule"])) if "share_within_rule" in c else None})
    return ["<h2 id='content'>Content areas</h2>",
            "<p>Scored items per test in each content area, against the blueprint's bounds.</p>",
            table_html(rows, ["area", "rule", "mean", "range", "within"],
                       labels={"area": "Area", "rule": "Blueprint", "mean": "Mean per test",
                               "range": "Fewest to most", "within": "Tests within the bounds"})]


def study_title(result, title: str = "") -> str:
    """The page title of a study: ``title``, or the design's and the bank's names."""
    return title or f"Simulation of {result.design.source or 'a design'} on {result.bank.name or 'a bank'}"


def study_sections(summary: dict) -> list:
    """The contents line's first sections of a study page, classification when the summary has one."""
    nav = [("design", "Design"), ("glance", "At a glance"), ("length", "Length"), ("precision", "Precision"),
           ("exposure", "Exposure")]
    if summary.get("classification"):
        nav.append(("classification", "Classification"))
    return nav


def simulation_report_html(result, summary: dict, *, title: str = "", first_counts=None, follow_counts=None,
                           warnings=()) -> str:
    """The report page of a simulation study (a :class:`SimulationResult` and its summary).

    Parameters
    ----------
    first_counts, follow_counts : int (n_items,), optional
        How often each item was given as the first item of a test, and as a follow-on
        member of its item set (after the set's first item): they explain the exposure
        section (:class:`~adaptive_engine.simulation.exposure_diagnosis.LotteryFreeCounts`).
    warnings : sequence of Problem
        :func:`~adaptive_engine.design.bank_fit.design_warnings` of the pair, shown with
        the design.
    """
    design = result.design
    title = study_title(result, title)
    nav = study_sections(summary)
    if summary.get("content"):
        nav.append(("content", "Content"))
    nav += [("bank", "Bank"), ("glossary", "Glossary")]
    parts = [page_start(title),
             contents_line(f"Simulation study of the design <code>{esc(design.source or '(built in code)')}</code>.",
                           nav)]
    parts += design_section(result, summary, warnings)
    parts += _headline_section(summary)
    parts += _length_section(result, summary)
    parts += _precision_section(summary)
    parts += _exposure_section(result, summary, first_counts, follow_counts)
    parts += _classification_section(result, summary)
    parts += _content_section(summary)
    parts.append("<h2 id='bank'>The bank</h2>")
    caption = "Test information of all operational items of the bank (the most any test could draw on at each ability)"
    parts.append(figure_html(caption, _information_figure(result.bank, caption)))
    parts.append(glossary_html(GLOSSARY))
    parts.append("</body></html>\n")
    return "".join(parts)


# ----------------------------------------------------------------------------------------
# the tuning page

#: Column headings of the tuning table.
TUNING_LABELS = {
    "mean_length": "Mean length", "sd_length": "SD of length", "share_at_max_items": "Share at max length",
    "rmse": "RMSE", "bias": "Bias", "mean_se": "Mean SE", "rmse_to_mean_se": "RMSE / mean SE",
    "max_exposure": "Largest exposure", "frontier": "On the frontier",
    "precision_of": "RMSE of", "rmse_worst_dimension": "RMSE, worst dimension",
}


def tuning_report_html(rows: list[dict], figures, *, title: str, varied: list[str] | None = None,
                       extra_columns: list[str] = (), note: str | None = None) -> str:
    """The report page of a tuning run: its table and the trade-off plots.

    Parameters
    ----------
    rows : list of dict
        :func:`adaptive_engine.simulation.tuning.tune` rows.
    figures : list of (caption, SVG), optional
        The trade-off plots (:func:`adaptive_engine.simulation.tuning.tradeoff_figures`).
    varied : list of str, optional
        The varied design keys (default: the keys before ``mean_length``).
    extra_columns : list of str, optional
        Further row keys shown after the RMSE (e.g. the RMSE of every dimension of an
        ability vector).
    note : str, optional
        A paragraph under the introduction (what the columns mean for this run).
    """
    keys = varied
    if keys is None and rows:
        keys = []
        for k in rows[0]:
            if k == "mean_length":
                break
            keys.append(k)
    keys = keys or []
    acc = [k for k in (rows[0] if rows else {}) if k.startswith("accuracy_")]
    extra = [k for k in extra_columns if k not in keys]
    cols = ["combination", *keys, "mean_length", "rmse", *extra, *acc, "bias", "mean_se", "rmse_to_mean_se",
            "max_exposure", "frontier"]
    table = []
    dominated = set()
    for j, r in enumerate(rows, start=1):
        if not r.get("frontier"):
            dominated.add(j)
        row = {"combination": j, **{k: r.get(k) for k in keys}}
        row.update(mean_length=Html(fmt(r.get("mean_length"), 1)), rmse=r.get("rmse"), bias=r.get("bias"),
                   mean_se=r.get("mean_se"), rmse_to_mean_se=Html(fmt(r.get("rmse_to_mean_se"), 2)),
                   max_exposure=Html(pct(r.get("max_exposure"))), frontier=Html("yes" if r.get("frontier") else ""))
        for k in acc:
            row[k] = Html(pct(r.get(k)))
        for k in extra:
            row[k] = r.get(k)
        table.append(row)
    labels = dict(TUNING_LABELS, combination="#")
    labels.update({k: f"Accuracy ({k[len('accuracy_'):]})" for k in acc})
    labels.update({k: TUNING_LABELS.get(k) or (f"RMSE, {k[len('rmse_'):]}" if k.startswith("rmse_") else k)
                   for k in extra})
    criteria = "mean length (lower), RMSE (lower)" + (" and classification accuracy (higher)" if acc else "")
    parts = [page_start(title),
             f"<p>Every combination of {', '.join(f'<code>{esc(k)}</code>' for k in keys) or 'the settings'} ran "
             "on the same simulated examinees with the same random streams (common random numbers), so the "
             "differences between rows are the settings' doing. A combination is <b>on the frontier</b> when no "
             f"other is at least as good on {criteria} and better on one of them.</p>",
             f"<p>{esc(note)}</p>" if note else "",
             table_html(table, cols, labels=labels,
                        row_class=lambda r: "thin" if r["combination"] in dominated else None),
             "<p class='note'>Rows in grey italics are dominated: another combination is at least as good on every "
             "criterion. The numbers in the # column label the points of the plots.</p>"]
    for caption, svg in figures or ():
        parts.append(figure_html(caption, svg))
    parts.append(glossary_html(glossary_entries("theta units", "RMSE", "bias", "RMSE / mean SE", "exposure rate",
                                                "classification accuracy"),
                               [("mean length", "scored items per test, averaged over the examinees")]))
    parts.append("</body></html>\n")
    return "".join(parts)
