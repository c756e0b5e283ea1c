"""The self-contained HTML report of a multidimensional simulation study.

The counterpart of the one-dimensional study page
(:func:`adaptive_engine.simulation.html_report.simulation_report_html`), built from its
pieces: the same page skeleton, tables, figures and glossary.  It says which design was
simulated (in the plain words ``design check`` prints), gives the headline figures per
dimension and for the composite (bias, RMSE, mean SE, RMSE / mean SE, correlation with the
truth) beside the correlation of the true abilities drawn, then test length, precision by
true ability on each dimension (thin bins marked), exposure and, when the design classifies
the composite against cut scores, the composite's classification.
"""

from __future__ import annotations

import numpy as np

from .html_report import (
    Html,
    classification_parts,
    contents_line,
    design_section,
    esc,
    exposure_by_stratum_parts,
    exposure_figure,
    figure_html,
    fmt,
    glossary_entries,
    glossary_html,
    page_start,
    pct,
    precision_by_ability,
    stop_reasons_and_length_figure,
    study_sections,
    study_title,
    table_html,
)

#: The terms of the one-dimensional glossary this page uses, and its own.
_GLOSSARY_TERMS = ("theta units", "RMSE", "bias", "standard error (SE)", "RMSE / mean SE", "exposure rate",
                   "classification accuracy", "false pass / false fail", "thin bin")
_EXTRA_GLOSSARY = (
    ("dimension", "one of the abilities the bank's items measure; every item has a slope on each dimension, and the "
                  "test estimates all of them at once"),
    ("composite", "the weighted sum of the dimensions given by [reporting] composite_weights; its SE comes from the "
                  "posterior covariance of the dimensions"),
    ("correlation with truth", "the correlation of the final estimates with the simulated true abilities (1 is "
                               "perfect)"),
    ("true latent correlation", "the correlation of the simulated true abilities of the first two dimensions, as "
                                "drawn (not estimated)"),
)

_PRECISION_LABELS = {"name": "", "bias": "Bias", "rmse": "RMSE", "mean_se": "Mean SE",
                     "rmse_to_mean_se": "RMSE / mean SE", "correlation_with_truth": "Correlation with truth"}


def _words(name: str) -> str:
    return str(name).replace("_", " ")


def _precision_table(summary: dict) -> str:
    rows = [{"name": Html(f"{esc(_words(name))}"), **{k: m[k] for k in _PRECISION_LABELS if k != "name"}}
            for name, m in summary["dimensions"].items()]
    if "composite" in summary:
        c = summary["composite"]
        weights = ", ".join(f"{w:g}" for w in c["weights"])
        rows.append({"name": Html(f"composite (weights {esc(weights)})"),
                     **{k: c[k] for k in _PRECISION_LABELS if k != "name"}})
    labels = dict(_PRECISION_LABELS, name="Dimension")
    return table_html(rows, list(_PRECISION_LABELS), labels=labels)


def _headline_section(result, summary: dict) -> list[str]:
    length = summary["length"]
    expo = summary["exposure"]
    n = max(summary["examinees"], 1)
    rows = [{"figure": "Simulated examinees", "value": Html(f"{summary['examinees']:,}")}]
    abilities = (summary.get("settings") or {}).get("abilities")
    if abilities:
        rows.append({"figure": "True abilities drawn from", "value": Html(esc(abilities))})
    if summary.get("true_correlation") is not None:
        rows.append({"figure": "True latent correlation drawn (first two dimensions)",
                     "value": Html(fmt(summary["true_correlation"]))})
    rows += [
        {"figure": "Mean test length (SD)",
         "value": Html(f"{fmt(length['mean'], 1)} ({fmt(length['sd'], 1)}) scored items")},
        {"figure": "Shortest / longest test", "value": Html(f"{length['min']} / {length['max']} scored items")},
        {"figure": "Why tests stopped", "value": Html(", ".join(
            f"{esc(k)} {pct(v / n)}" for k, v in sorted(summary["stop_reasons"].items(), key=lambda kv: -kv[1])))},
        {"figure": "Largest exposure rate", "value": Html(f"{pct(expo['max_rate'])} of examinees")},
        {"figure": "Items used / never used",
         "value": Html(f"{expo['items_used']} / {expo['items_never_used']} of {result.bank.n_items}")},
    ]
    if expo.get("share_above_target") is not None:
        rows.append({"figure": f"Operational items above the exposure target ({pct(expo['exposure_target'], 0)})",
                     "value": Html(pct(expo["share_above_target"]))})
    for c in summary.get("classification", []):
        rows.append({"figure": f"Classification accuracy of the composite at the cut {c['cut']!r}",
                     "value": Html(f"{pct(c['accuracy'])} of examinees")})
    return ["<h2 id='glance'>At a glance</h2>",
            "<p>How close the final estimates come to the simulated true abilities, per dimension and for the "
            "composite (theta units).</p>",
            _precision_table(summary),
            table_html(rows, ["figure", "value"], labels={"figure": "Figure", "value": "Value"}),
            "<p class='note'>Terms are explained in the <a href='#glossary'>glossary</a> at the end.</p>"]


def _length_section(result, summary: dict) -> list[str]:
    return ["<h2 id='length'>Test length</h2>",
            "<p>Scored items per test (pretest items are given besides and not counted).</p>",
            *stop_reasons_and_length_figure(result, summary["stop_reasons"], meanings={
                "se_reached": "the standard error of every dimension fell to its target"})]


def conditional_by_dimension(result) -> dict[str, list[dict]]:
    """:func:`adaptive_engine.simulation.metrics.conditional` of each dimension: its estimates
    binned by the true ability on that dimension."""
    from .metrics import conditional

    return {name: conditional(result.true_theta[:, j], result.theta[:, j], result.se[:, j], result.n_scored)
            for j, name in enumerate(result.dimension_names)}


def _precision_section(result) -> list[str]:
    parts = ["<h2 id='precision'>Precision by true ability</h2>",
             "<p>Each dimension's estimates against the true ability on that dimension, binned (0.5 wide, open "
             "outer bins; one bin per point of a grid of abilities).</p>"]
    for name, rows in conditional_by_dimension(result).items():
        words = _words(name)
        parts.append(f"<h3>{esc(words)}</h3>")
        parts += precision_by_ability(rows, ability=f"true {words}", heading=f"By true {words}",
                                      title=f"Precision by {words}")
    return parts


def _exposure_section(result, summary: dict) -> list[str]:
    expo = summary["exposure"]
    target = expo["exposure_target"]
    operational = np.asarray(result.bank.status) == "operational"
    rates = result.administered / max(result.size, 1)
    over = int(np.sum(rates[operational] > target))
    if over:
        box = (f"<div class='box miss'><b>The exposure target of {pct(target, 0)} is missed</b> by {over} of the "
               f"{int(operational.sum())} operational items (the largest rate is "
               f"{pct(rates[operational].max())}).</div>")
    else:
        box = (f"<div class='box ok'>The exposure target is met: no operational item is given to more than "
               f"{pct(target, 0)} of the examinees.</div>")
    caption = "Exposure rates of the operational items, most exposed first, against the target"
    parts = ["<h2 id='exposure'>Exposure</h2>",
             "<p>The exposure rate of an item is the share of examinees who were given it (operational items only: "
             "pretest items are seeded at random). items.csv has every item's rate.</p>", box,
             figure_html(caption, exposure_figure(rates[operational], target, caption))]
    if expo.get("by_stratum"):
        parts += exposure_by_stratum_parts(expo["by_stratum"], "the true composite")
    return parts


def _classification_section(result, summary: dict) -> list[str]:
    from ..kernel.final_report import classification_matrix
    from ..kernel.multidimensional_cycle import composite

    classes = summary.get("classification") or []
    if not classes:
        return []
    design = result.design
    w = np.asarray(design.reporting.composite_weights, dtype=float)
    est, _ = composite(w, result.theta, result.covariance)
    intro = ("<p>The composite (the weighted sum of the dimensions) is classified at or above each cut score, or "
             "below it, by its final estimate; the simulation knows on which side the true composite lies.</p>")
    return classification_parts(classes, design.reporting.cut_scores, result.true_theta @ w,
                                classification_matrix(design, est), intro=intro, ability="true composite")


def multidimensional_report_html(result, summary: dict, *, title: str = "", warnings=()) -> str:
    """The report page of a multidimensional study.

    Parameters
    ----------
    result : MultidimensionalSimulationResult
    summary : dict
        :func:`~adaptive_engine.simulation.multidimensional_engine.multidimensional_metrics`
        with the run's ``settings``.
    warnings : sequence of Problem
        :func:`~adaptive_engine.design.bank_fit.design_warnings` of the pair, shown with
        the design.
    """
    design = result.design
    title = study_title(result, title)
    nav = study_sections(summary) + [("glossary", "Glossary")]
    k = len(result.dimension_names)
    parts = [page_start(title),
             contents_line(f"Simulation study of the design <code>{esc(design.source or '(built in code)')}</code>, "
                           f"which measures {k} abilities at once ("
                           + ", ".join(esc(_words(d)) for d in result.dimension_names) + ").", nav)]
    parts += design_section(result, summary, warnings)
    parts += _headline_section(result, summary)
    parts += _length_section(result, summary)
    parts += _precision_section(result)
    parts += _exposure_section(result, summary)
    parts += _classification_section(result, summary)
    parts.append(glossary_html(glossary_entries(*_GLOSSARY_TERMS), _EXTRA_GLOSSARY))
    parts.append("</body></html>\n")
    return "".join(parts)

