"""Self-contained HTML reports of simulation studies (tables, and plots as embedded PNG).

Plots need matplotlib (the ``plots`` extra); without it the report still has every table
and says that the plots were left out.  The page loads nothing from the network.
"""

from __future__ import annotations

import base64
import html
import io
import math

import numpy as np

_STYLE = """
body{font-family:system-ui,-apple-system,Segoe UI,sans-serif;margin:2em auto;max-width:70em;color:#222}
table{border-collapse:collapse;margin:0.5em 0 1.5em}
td,th{border:1px solid #ccc;padding:0.2em 0.6em;text-align:right}
th{background:#f0f0f0} td.l,th.l{text-align:left}
figure{display:inline-block;margin:0.5em}
.note{color:#666}
"""


def pyplot_or_none():
    """matplotlib.pyplot on the Agg backend, or None when the plots extra is not installed."""
    try:
        import matplotlib

        matplotlib.use("Agg")
        import matplotlib.pyplot as plt
    except ImportError:
        return None
    return plt


def png_base64(fig) -> str:
    """The figure as a base64 PNG for a data: URL."""
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=90, bbox_inches="tight")
    return base64.b64encode(buf.getvalue()).decode("ascii")


def _fmt(v) -> str:
    if v is None:
        return "&ndash;"
    if isinstance(v, float):
        return "&ndash;" if not math.isfinite(v) else f"{v:.4g}"
    return html.escape(str(v))


def table_html(rows: list[dict], columns: list[str] | None = None) -> str:
    """An HTML table of flat dicts (first column left-aligned)."""
    if not rows:
        return "<p class='note'>(none)</p>"
    cols = columns or list(dict.fromkeys(k for r in rows for k in r))
    head = "".join(f"<th{' class=l' if j == 0 else ''}>{html.escape(c)}</th>" for j, c in enumerate(cols))
    body = "".join(
        "<tr>" + "".join(f"<td{' class=l' if j == 0 else ''}>{_fmt(r.get(c))}</td>" for j, c in enumerate(cols))
        + "</tr>" for r in rows)
    return f"<table><tr>{head}</tr>{body}</table>"


def _figures(result, summary) -> list[tuple[str, str]]:
    """(caption, base64 PNG) pairs; empty without matplotlib."""
    plt = pyplot_or_none()
    if plt is None:
        return []
    out = []
    cond = [r for r in summary["conditional"] if r["theta"] is not None]
    th = np.array([r["theta"] for r in cond])

    def col(name):
        return np.array([np.nan if r.get(name) is None else r[name] for r in cond], dtype=float)

    fig, ax = plt.subplots(figsize=(6, 3.6))
    ax.plot(th, col("rmse"), "o-", label="RMSE")
    ax.plot(th, col("bias"), "s-", label="bias")
    ax.plot(th, col("mean_se"), "^-", label="mean SE")
    ax.axhline(0, color="grey", lw=0.5)
    ax.set_xlabel("true theta")
    ax.legend()
    out.append(("Conditional RMSE, bias and SE", png_base64(fig)))
    plt.close(fig)

    fig, ax = plt.subplots(figsize=(6, 3.6))
    ax.plot(th, col("mean_length"), "o-")
    ax.set_xlabel("true theta")
    ax.set_ylabel("mean scored items")
    out.append(("Test length against ability", png_base64(fig)))
    plt.close(fig)

    operational = np.asarray(result.bank.status) == "operational"
    rates = result.administered[operational] / max(result.size, 1)
    fig, ax = plt.subplots(figsize=(6, 3.6))
    ax.hist(rates, bins=40, color="#4477aa")
    target = summary["exposure"].get("exposure_target")
    if target is not None:
        ax.axvline(target, color="crimson", ls="--", label=f"target {target:g}")
        ax.legend()
    ax.set_xlabel("exposure rate")
    ax.set_ylabel("items")
    out.append(("Exposure rates of the operational items", png_base64(fig)))
    plt.close(fig)

    from ..irt import models

    grid = np.linspace(-4, 4, 161)
    info = models.information(*models.outer(result.bank.params.take(np.flatnonzero(operational)), grid)).sum(axis=0)
    fig, ax = plt.subplots(figsize=(6, 3.6))
    ax.plot(grid, info, color="black")
    ax.set_xlabel("theta")
    ax.set_ylabel("bank information")
    out.append(("Information of the operational bank", png_base64(fig)))
    plt.close(fig)
    return out


def simulation_report_html(result, summary: dict, *, title: str = "") -> str:
    """The report page of a simulation study (a :class:`SimulationResult` and its summary)."""
    title = title or f"Simulation of {result.design.source or 'a design'} on {result.bank.name or 'a bank'}"
    headline = [{"figure": k, "value": summary.get(k)} for k in
                ("examinees", "rmse", "bias", "mae", "mean_se", "se_calibration", "correlation",
                 "marginal_reliability", "mean_length", "max_exposure", "overlap_rate", "chi_square_index",
                  "exposure_target", "share_above_target")]
    length = summary["length"]
    length_rows = [{"figure": k, "value": v} for k, v in length.items() if not isinstance(v, dict)]
    length_rows += [{"figure": k, "value": v} for k, v in length["length_percentiles"].items()]
    reasons = [{"stop reason": k, "examinees": v} for k, v in length["stop_reasons"].items()]
    expo = [{"figure": k, "value": v} for k, v in summary["exposure"].items() if k != "by_stratum"]
    parts = [f"<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'><title>{html.escape(title)}</title>",
             f"<style>{_STYLE}</style></head><body><h1>{html.escape(title)}</h1>",
             f"<p class='note'>{_fmt(summary.get('examinees'))} simulated examinees, "
             f"seed {_fmt(summary.get('seed'))}.</p>",
             "<h2>Precision</h2>", table_html(headline),
             "<h2>Test length</h2>", table_html(length_rows), table_html(reasons),
             "<h2>Exposure</h2>", table_html(expo)]
    if summary["exposure"].get("by_stratum"):
        parts += ["<p class='note'>Exposure within strata of true ability (the design's "
                  "conditional exposure parameters):</p>", table_html(summary["exposure"]["by_stratum"])]
    if summary["classification"]:
        parts += ["<h2>Classification</h2>", table_html(summary["classification"])]
    if summary["content"]:
        parts += ["<h2>Content areas (scored items per examinee)</h2>", table_html(summary["content"])]
    parts += ["<h2>By ability</h2>", table_html(summary["conditional"])]
    figures = _figures(result, summary)
    parts.append("<h2>Plots</h2>")
    if figures:
        for caption, data in figures:
            parts.append(f"<figure><img alt='{html.escape(caption)}' src='data:image/png;base64,{data}'>"
                         f"<figcaption>{html.escape(caption)}</figcaption></figure>")
    else:
        parts.append("<p class='note'>Plots left out: matplotlib is not installed "
                     "(install the 'plots' extra).</p>")
    parts.append("</body></html>\n")
    return "".join(parts)


def tuning_report_html(rows: list[dict], figure_png: str | None, *, title: str) -> str:
    """The report page of a stopping-rule tuning run (its table and trade-off plot)."""
    parts = [f"<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'><title>{html.escape(title)}</title>",
             f"<style>{_STYLE}</style></head><body><h1>{html.escape(title)}</h1>",
             "<p class='note'>All combinations ran on the same examinees with the same random streams "
             "(common random numbers). <b>frontier</b>: no other combination is at least as good in "
             "mean length, RMSE and classification accuracy and better in one.</p>",
             table_html(rows)]
    if figure_png:
        parts.append(f"<figure><img alt='trade-off' src='data:image/png;base64,{figure_png}'>"
                     "<figcaption>Mean length against RMSE (frontier marked)</figcaption></figure>")
    else:
        parts.append("<p class='note'>Plot of mean length against RMSE left out: matplotlib is not "
                     "installed (install the 'plots' extra).</p>")
    parts.append("</body></html>\n")
    return "".join(parts)
