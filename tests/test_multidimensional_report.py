"""The report page of a multidimensional study (``simulate`` on the two-dimensional demo design).

What the page says is checked against the study's other files, which the page is not built
from by these tests' reading: the at-a-glance figures against summary.json, the binned RMSE
of each dimension against a recomputation from examinees.csv (RMSE = sqrt(mean((estimate -
truth)^2)) by definition, bins of 0.5 from -3 to 3 with open outer bins as the page says),
the items' exposure against examinees.csv.  (The page's layout in a browser is checked by
``tests/test_report_pages.py``.)
"""

from __future__ import annotations

import csv
import html
import json
import re
import xml.etree.ElementTree as ET
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner

from adaptive_engine.cli import main

#: one simulation of 150 examinees serves the module (a few seconds)
pytestmark = pytest.mark.long_running

ROOT = Path(__file__).resolve().parents[1]
DESIGN = ROOT / "simulations" / "licensing_two_dimensional.toml"
BANK = ROOT / "item_banks" / "meridian_valley_operator_2d.json"


@pytest.fixture(scope="module")
def study(tmp_path_factory):
    if not DESIGN.exists() or not BANK.exists():
        pytest.skip("shipped demo files missing")
    out = tmp_path_factory.mktemp("md_study")
    (out / "conditional.csv").write_text("left by an earlier one-dimensional run\n")
    got = CliRunner().invoke(main, ["simulate", str(DESIGN), "--bank", str(BANK), "--examinees", "150",
                                    "--theta", "correlated_normal:0,1,0.6", "--out", str(out)])
    assert got.exit_code == 0, got.output
    with (out / "examinees.csv").open() as f:
        examinees = list(csv.DictReader(f))
    with (out / "items.csv").open() as f:
        items = list(csv.DictReader(f))
    return dict(out=out, output=got.output, page=(out / "report.html").read_text(),
                summary=json.loads((out / "summary.json").read_text()), examinees=examinees, items=items)


def _charts(page: str) -> list[ET.Element]:
    """Every chart of the page parsed as XML (a chart that is not well-formed fails here)."""
    return [ET.fromstring(svg) for svg in re.findall(r"<svg .*?</svg>", page, flags=re.S)]


class _Nesting(HTMLParser):
    """Tags outside the charts must close in the order they opened (void elements aside)."""

    VOID = {"meta", "br", "wbr", "img", "hr", "input", "link"}

    def __init__(self):
        super().__init__()
        self.stack, self.errors = [], []

    def handle_starttag(self, tag, attrs):
        if tag not in self.VOID:
            self.stack.append(tag)

    def handle_endtag(self, tag):
        if not self.stack or self.stack[-1] != tag:
            self.errors.append(f"</{tag}> closes {self.stack[-1:] or 'nothing'}")
        else:
            self.stack.pop()


def _tables_after(page: str, anchor: str) -> list[list[list[str]]]:
    """The tables following ``anchor`` up to the next h2/h3, as rows of cell texts."""
    part = page.split(anchor, 1)[1]
    part = re.split(r"<h[23][ >]", part, maxsplit=1)[0]
    out = []
    for table in re.findall(r"<table>(.*?)</table>", part, flags=re.S):
        rows = re.findall(r"<tr[^>]*>(.*?)</tr>", table, flags=re.S)
        cells = [re.findall(r"<t[dh][^>]*>(.*?)</t[dh]>", r) for r in rows]
        out.append([[html.unescape(re.sub(r"<[^>]+>", "", c)).strip() for c in row] for row in cells])
    return out


def test_the_cli_names_the_files_and_leaves_no_stale_one(study):
    assert "summary.json, examinees.csv, items.csv, report.html" in study["output"]
    assert "composite classified at the cut licence" in study["output"]
    assert sorted(p.name for p in study["out"].iterdir()) == ["examinees.csv", "items.csv", "report.html",
                                                              "summary.json"]


def test_the_page_is_well_formed_and_says_the_design_in_words(study):
    from adaptive_engine.design.bank_fit import describe_design
    from adaptive_engine.design.toml_file import read_design

    page = study["page"]
    outside = re.sub(r"<svg .*?</svg>", "", page, flags=re.S)
    parser = _Nesting()
    parser.feed(outside)
    assert parser.errors == [] and parser.stack == []
    assert re.findall(r"<h2 id='([a-z]+)'>", page) == ["design", "glance", "length", "precision", "exposure",
                                                         "classification", "glossary"]
    text = html.unescape(re.sub(r"<[^>]+>", " ", page))
    for line in describe_design(read_design(DESIGN)):
        head, _, rest = line.partition(": ")
        assert head in text and rest in text, line
    assert "<img" not in page and "data:" not in page


def test_one_labelled_chart_per_promised_figure(study):
    page = study["page"]
    charts = _charts(page)
    assert len(charts) == page.count("<figure>") == page.count("<figcaption>")
    names = [c.get("aria-label") for c in charts]
    # length distribution, precision of each of the two dimensions, exposure, the composite's classification
    assert [n.split(" ")[0] for n in names] == ["Distribution", "RMSE,", "RMSE,", "Exposure", "Probability"]
    for chart in charts:
        ylabels = [t.text for t in chart.iter("text") if t.get("class") == "ylabel"]
        assert ylabels and all(ylabels)
    assert "true treatment operations" in names[1] and "true regulation and safety" in names[2]
    exposure = charts[3]
    assert any((t.text or "").startswith("exposure target 0.25") for t in exposure.iter("text"))


def test_at_a_glance_figures_are_summary_json(study):
    s = study["summary"]
    precision, figures = _tables_after(study["page"], "<h2 id='glance'>")
    assert precision[0] == ["Dimension", "Bias", "RMSE", "Mean SE", "RMSE / mean SE", "Correlation with truth"]
    expected = [(name.replace("_", " "), m) for name, m in s["dimensions"].items()]
    expected.append(("composite (weights 0.5, 0.5)", s["composite"]))
    assert len(precision) == 1 + len(expected)
    for row, (name, m) in zip(precision[1:], expected):
        assert row[0] == name
        assert row[1:] == [f"{m[k]:.3f}" for k in ("bias", "rmse", "mean_se", "rmse_to_mean_se",
                                                      "correlation_with_truth")]
    table = dict(r for r in figures[1:])
    assert table["Simulated examinees"] == "150"
    assert table["True latent correlation drawn (first two dimensions)"] == f"{s['true_correlation']:.3f}"
    assert table["Mean test length (SD)"] == f"{s['length']['mean']:.1f} ({s['length']['sd']:.1f}) scored items"
    assert table["Shortest / longest test"] == f"{s['length']['min']} / {s['length']['max']} scored items"
    for reason, count in s["stop_reasons"].items():
        assert f"{reason} {100 * count / 150:.1f}%" in table["Why tests stopped"]
    assert table["Largest exposure rate"] == f"{100 * s['exposure']['max_rate']:.1f}% of examinees"
    expo = s["exposure"]
    assert table["Items used / never used"] == f"{expo['items_used']} / {expo['items_never_used']} of 360"
    (c,) = s["classification"]
    accuracy = table["Classification accuracy of the composite at the cut 'licence'"]
    assert accuracy == f"{100 * c['accuracy']:.1f}% of examinees"


def test_binned_rmse_of_each_dimension_matches_examinees_csv(study):
    rows = study["examinees"]
    edges = np.arange(-3.0, 3.01, 0.5)
    for name in study["summary"]["dimensions"]:
        true = np.array([float(r[f"true_{name}"]) for r in rows])
        est = np.array([float(r[f"theta_{name}"]) for r in rows])
        bin_of = np.searchsorted(edges, true, side="right")
        words = name.replace("_", " ")
        (table,) = _tables_after(study["page"], f"<h3>By true {words}</h3>")
        assert table[0][:4] == [f"True {words}", "Examinees", "Bias", "RMSE"]
        assert sum(int(r[1]) for r in table[1:]) == len(rows)
        shown = {r[0]: (int(r[1]), float(r[3])) for r in table[1:]}
        for b in np.unique(bin_of):
            sel = bin_of == b
            label = (f"< {edges[0]:g}" if b == 0 else f">= {edges[-1]:g}" if b == edges.size
                     else f"[{edges[b - 1]:g}, {edges[b]:g})")
            n, rmse = shown[label]
            assert n == int(sel.sum())
            # examinees.csv holds 6 significant digits, the page 3 decimals
            assert rmse == pytest.approx(np.sqrt(np.mean((est[sel] - true[sel]) ** 2)), abs=6e-4), (name, label)
        thin = sum(1 for n, _ in shown.values() if n < 30)
        assert thin  # the outer bins of 150 examinees
    assert study["page"].count("<tr class=thin>") >= 2


def test_items_csv_counts_what_the_examinees_were_given(study):
    given = sum(int(r["n_scored"]) + int(r["n_pretest"]) for r in study["examinees"])
    assert sum(int(r["times_given"]) for r in study["items"]) == given
    rates = [float(r["exposure_rate"]) for r in study["items"]]
    assert max(rates) == pytest.approx(study["summary"]["exposure"]["max_rate"], abs=1e-6)
    assert sum(1 for r in study["items"] if int(r["times_given"]) == 0) == \
        study["summary"]["exposure"]["items_never_used"]
