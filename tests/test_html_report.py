"""The study and tuning report pages: what they say, and that they say it readably.

(Their layout in a real browser is checked by ``tests/test_report_pages.py``.)
"""

from __future__ import annotations

import csv
import html
import re
from pathlib import Path

import numpy as np
import pytest

from adaptive_engine.bank.item_bank import load_bank
from adaptive_engine.design.bank_fit import describe_design
from adaptive_engine.design.toml_file import read_design
from adaptive_engine.simulation import html_report
from adaptive_engine.simulation.population import Population, parse_ability_spec
from adaptive_engine.simulation.study import run_study
from optional_extras import requires_matplotlib

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


def test_met_exposure_target_is_said(tmp_path, figures_not_rasterized):
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


@requires_matplotlib
def test_every_plot_has_a_y_label_and_the_classification_plot_marks_the_cut(licensing, monkeypatch):
    study, _, _ = licensing
    seen = []

    def record(fig):
        seen.append([(ax.get_ylabel(), [line.get_xdata()[0] for line in ax.get_lines()
                                         if line.get_linestyle() == "--" and len(line.get_xdata()) == 2])
                     for ax in fig.axes])
        return "AAAA"

    monkeypatch.setattr(html_report, "png_base64", record)
    page = html_report.simulation_report_html(study.result, study.summary)
    assert len(seen) == page.count("base64,AAAA") >= 6
    assert all(label for fig in seen for label, _ in fig)
    cut = study.result.design.reporting.cut_scores[0].theta
    classification = [fig for fig in seen if fig[0][0] == "share of examinees"]
    assert classification and any(cut in marks for _, marks in classification[0])


@requires_matplotlib
def test_tuning_page_plots_every_frontier_criterion(monkeypatch):
    from adaptive_engine.simulation.tuning import tradeoff_figures

    rows = [{"stopping.se": se, "mean_length": ln, "rmse": rm, "accuracy_licence": acc, "frontier": f}
            for se, ln, rm, acc, f in ((0.25, 30.0, 0.30, 0.93, True), (0.3, 25.0, 0.33, 0.92, True),
                                       (0.35, 25.5, 0.34, 0.91, False))]
    ylabels = []

    def record(fig):
        ylabels.append(fig.axes[0].get_ylabel())
        return "AAAA"

    monkeypatch.setattr(html_report, "png_base64", record)
    figures = tradeoff_figures(rows, ["stopping.se"])
    assert ylabels == ["RMSE (theta units)", "classification accuracy (licence)"]
    page = html_report.tuning_report_html(rows, figures, title="t", varied=["stopping.se"])
    assert page.count("base64,AAAA") == 2 and "accuracy" in page.lower()
    assert "<tr class=thin>" in page  # the dominated row is greyed, and the page says what grey means
    assert "dominated" in page


@requires_matplotlib
def test_point_labels_do_not_overlap():
    plt = html_report.pyplot_or_none()
    rng = np.random.default_rng(0)
    # a dense but placeable cloud: 14 points within a few label heights of each other
    x = 20 + rng.uniform(0, 3, 14)
    y = 0.30 + rng.uniform(0, 0.02, 14)
    fig, ax = plt.subplots(figsize=(7.2, 4.4))
    ax.scatter(x, y, s=40)
    ax.margins(0.3)
    texts = html_report.place_labels(ax, x, y, [str(j) for j in range(1, 15)])
    fig.canvas.draw()
    renderer = fig.canvas.get_renderer()
    boxes = [t.get_window_extent(renderer) for t in texts]
    points = ax.transData.transform(np.column_stack([x, y]))
    for i, a in enumerate(boxes):
        for b in boxes[i + 1:]:
            assert not a.overlaps(b)
        for px, py in points:  # no label covers a point's centre
            assert not (a.x0 < px < a.x1 and a.y0 < py < a.y1)
    plt.close(fig)


def test_the_page_without_matplotlib_keeps_every_table(licensing, monkeypatch):
    study, _, _ = licensing
    monkeypatch.setattr(html_report, "pyplot_or_none", lambda: None)
    page = html_report.simulation_report_html(study.result, study.summary)
    assert "<img" not in page and "Plots left out" in page
    assert "Items above the target" in page and "Why tests stopped" in page
