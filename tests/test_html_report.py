"""The study and tuning report pages: what they say, and that they say it readably.

(Their layout in a real browser is checked by ``tests/test_report_pages.py``.)
"""

from __future__ import annotations

import csv
import html
import os
import re
import subprocess
import sys
import xml.etree.ElementTree as ET
from pathlib import Path

import numpy as np
import pytest

from adaptive_engine.bank.item_bank import load_bank
from adaptive_engine.design.bank_fit import describe_design
from adaptive_engine.design.toml_file import read_design
from adaptive_engine.simulation import html_report
from adaptive_engine.simulation.population import Population, parse_ability_spec
from adaptive_engine.simulation.study import run_study

ROOT = Path(__file__).resolve().parents[1]


def _shipped(name="licensing_exam.toml", bank="meridian_valley_operator.csv"):
    design, bank_file = ROOT / "simulations" / name, ROOT / "item_banks" / bank
    if not design.exists() or not bank_file.exists():
        pytest.skip("shipped demo files missing")
    return read_design(design), load_bank(bank_file)


@pytest.fixture(scope="module")
def licensing(tmp_path_factory):
    design, bank = _shipped()
    out = tmp_path_factory.mktemp("licensing")
    population = Population.drawn(parse_ability_spec("normal:0,1"), n_examinees=300, seed=2026)
    study = run_study(design, bank, population=population, out_dir=out, write_administrations=False)
    return study, (out / "report.html").read_text(), list(csv.DictReader((out / "items.csv").open()))


def _visible(page: str) -> str:
    """The page's text without tags, styles and images."""
    body = page.split("<body>", 1)[1]
    return html.unescape(re.sub(r"<[^>]+>", " ", body))


def test_the_page_names_the_design_and_says_it_in_words(licensing):
    study, page, _ = licensing
    text = _visible(page)
    assert "licensing_exam.toml" in text and "meridian_valley_operator" in text
    for line in describe_design(study.result.design):
        head, _, rest = line.partition(": ")
        assert head in text and rest in text, line


def test_sections_come_one_per_topic(licensing):
    _, page, _ = licensing
    ids = re.findall(r"<h2 id='([a-z]+)'>", page)
    assert ids == ["design", "glance", "length", "precision", "exposure", "classification", "content", "bank",
                   "glossary"]


def test_headings_and_labels_are_words_not_keys(licensing):
    _, page, _ = licensing
    headings = [html.unescape(re.sub(r"<[^>]+>", "", h)) for h in re.findall(r"<th[^>]*>(.*?)</th>", page)]
    labels = [html.unescape(c) for c in re.findall(r"<tr><td class=l>([^<]*)</td>", page)]
    assert headings and labels
    snake = re.compile(r"\b[a-z]+_[a-z_]+\b")
    # item ids, areas and stop-reason codes are data, not labels: only headings and the
    # figure names of the two-column tables are checked
    figure_labels = [x for x in labels if " " in x]
    assert not [h for h in headings if snake.search(h)]
    assert not [x for x in figure_labels if snake.search(x)]
    for old in ("se_calibration", "share_above_target", "max_exposure"):
        assert old not in _visible(page).split("Glossary")[0]
    assert "theta units" in page and "id='glossary'" in page


def test_missed_exposure_target_is_said_and_the_items_are_listed(licensing):
    study, page, items = licensing
    target = study.summary["exposure"]["exposure_target"]
    over = sorted((r for r in items if r["status"] == "operational" and float(r["exposure_rate"]) > target),
                  key=lambda r: -float(r["exposure_rate"]))
    assert over, "the shipped randomesque design exceeds 0.25 (issue: about 0.6 on 1,000 examinees)"
    text = _visible(page)
    assert "The exposure target of 25% is missed" in text
    assert f"{len(over)} of the 480 operational items" in text and over[0]["item_id"] in text
    assert f"Items above the target ({len(over)})" in text
    listed = re.findall(r"<tr><td class=l>(MV-[A-Z]+-\d+)</td>", page.split("Items above the target")[1])
    assert listed == [r["item_id"] for r in over[:html_report.MAX_LISTED_ITEMS]]
    # the over-exposed item set is explained as a set
    bank = study.result.bank
    sets = {bank.item_set[bank.index_of[r["item_id"]]] for r in over} - {""}
    assert sets
    for name in sets:
        assert f"{name} (" in text


def test_met_exposure_target_is_said(tmp_path):
    design, bank = _shipped()
    population = Population.drawn(parse_ability_spec("normal:0,1"), n_examinees=60, seed=5)
    run_study(design, bank, population=population, out_dir=tmp_path,
              exposure_target=1.0, write_administrations=False)
    text = _visible((tmp_path / "report.html").read_text())
    assert "The exposure target is met" in text and "is missed" not in text


def test_thin_bins_are_marked(licensing):
    study, page, _ = licensing
    thin = [r for r in study.summary["conditional"] if r["n"] < html_report.THIN_BIN]
    assert thin  # the outer bins of 300 normal examinees
    assert page.count("<tr class=thin>") == len(thin)


def test_classification_curve_counts_by_hand():
    # 50 distinct abilities: 0.25-wide bins.  30 in [-1.25, -1), every third at or above
    # (one of them without a label, which is not at or above); 20 in [0, 0.25), all at or above
    theta = np.concatenate([np.linspace(-1.24, -1.01, 30), np.linspace(0.01, 0.24, 20)])
    label = np.concatenate([np.where(np.arange(30) % 3 == 0, 1, 0), np.ones(20, dtype=int)])
    label[3] = -1
    rows = html_report.classification_curve(theta, label)
    assert [(r["n"], r["share_at_or_above"]) for r in rows] == [(30, 9 / 30), (20, 1.0)]
    assert rows[0]["theta"] == pytest.approx(theta[:30].mean())
    # a grid study (few distinct abilities): one bin per grid point
    grid = html_report.classification_curve(np.repeat([-1.0, 0.0, 1.0], 4), np.repeat([0, 1, 1], 4))
    assert [(r["theta"], r["n"], r["share_at_or_above"]) for r in grid] == [(-1.0, 4, 0.0), (0.0, 4, 1.0),
                                                                            (1.0, 4, 1.0)]


def _charts(page: str) -> list[ET.Element]:
    """Every chart of a page, parsed as XML (a chart that is not well-formed fails here)."""
    return [ET.fromstring(svg) for svg in re.findall(r"<svg .*?</svg>", page, flags=re.S)]


def _texts(chart: ET.Element, cls: str) -> list[ET.Element]:
    return [t for t in chart.iter("text") if t.get("class") == cls]


def test_every_figure_is_an_inline_chart_with_a_y_label_and_a_caption(licensing):
    _, page, _ = licensing
    charts = _charts(page)
    # length (distribution, by ability), precision, exposure, classification, bank information
    assert len(charts) == page.count("<figure>") == page.count("<figcaption>") == 6
    assert "<img" not in page and "data:" not in page  # nothing to load, nothing rasterized
    for chart in charts:
        assert chart.get("aria-label")
        labels = [t.text for t in _texts(chart, "ylabel")]
        assert labels and all(labels)


def test_the_classification_plot_marks_the_cut(licensing):
    study, page, _ = licensing
    cut = study.result.design.reporting.cut_scores[0].theta
    (chart,) = [c for c in _charts(page) if c.get("aria-label").startswith("Probability of being classified")]
    # pixel -> theta from the first and last tick labels of the x axis
    ticks = [(float(t.get("x")), float(t.text.replace("\u2212", "-"))) for t in _texts(chart, "xtick")]
    (p0, v0), (p1, v1) = ticks[0], ticks[-1]
    marks = [v0 + (float(line.get("x1")) - p0) * (v1 - v0) / (p1 - p0)
             for line in chart.iter("line") if line.get("class") == "vline"]
    assert len(marks) == 2  # in the plot and in the panel of counts beneath
    assert marks == pytest.approx([cut, cut], abs=0.01)
    assert [t.text for t in _texts(chart, "ylabel")] == ["share of examinees", "examinees"]


def test_tuning_page_plots_every_frontier_criterion():
    from adaptive_engine.simulation.tuning import tradeoff_figures

    rows = [{"stopping.se": se, "mean_length": ln, "rmse": rm, "accuracy_licence": acc, "frontier": f}
            for se, ln, rm, acc, f in ((0.25, 30.0, 0.30, 0.93, True), (0.3, 25.0, 0.33, 0.92, True),
                                       (0.35, 25.5, 0.34, 0.91, False))]
    figures = tradeoff_figures(rows, ["stopping.se"])
    page = html_report.tuning_report_html(rows, figures, title="t", varied=["stopping.se"])
    charts = _charts(page)
    assert [[t.text for t in _texts(c, "ylabel")] for c in charts] == [["RMSE (theta units)"],
                                                                      ["classification accuracy (licence)"]]
    for chart in charts:  # every combination's number beside its point
        assert sorted(t.text for t in _texts(chart, "point-label")) == ["1", "2", "3"]
    assert "<tr class=thin>" in page  # the dominated row is greyed, and the page says what grey means
    assert "dominated" in page


def test_a_study_imports_no_plotting_library(tmp_path):
    """A short simulate run loads only what it needs (common practice for command-line
    tools: start-up is most of a small run): no plotting library, and for an EAP design
    on one process no scipy and no multiprocessing either."""
    design = ROOT / "simulations" / "minimal.toml"
    bank = ROOT / "item_banks" / "meridian_valley_operator.csv"
    code = ("import sys; from adaptive_engine.cli import main; "
            f"main(['simulate', {str(design)!r}, '--bank', {str(bank)!r}, '--examinees', '20', "
            f"'--out', {str(tmp_path / 'out')!r}, '--no-administrations'], standalone_mode=False); "
            "print('loaded:', sorted(m for m in ('matplotlib', 'PIL', 'scipy', 'multiprocessing') "
            "if m in sys.modules))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True,
                         env=dict(os.environ, PYTHONPATH=str(ROOT)))
    assert out.stdout.strip().endswith("loaded: []")
    assert (tmp_path / "out" / "report.html").read_text().count("<svg ") >= 5
