"""The report pages in a real browser: no horizontal overflow at 1024 and 1400 px.

Renders the demo's study report (the shipped licensing design, as ``adaptive-engine demo``
writes it, on fewer examinees), the study report of the two-dimensional licensing design and
a tuning report in headless Chromium (Debian's
``chromium`` and ``chromium-driver``, driven by selenium with the system chromedriver) and
fails when the page scrolls sideways (``document.documentElement.scrollWidth >
window.innerWidth``) or a table, figure, chart, image or list is wider than its container,
and when a text of a chart covers another (tick labels, legend, the tuning plots' point
numbers) or a numbered point, as the browser lays them out in its own fonts.

Without Chromium, chromedriver or selenium the tests skip and say why -- except when the
environment variable ``CI`` is set, where a missing browser is a failure (``.ci/run``
installs it).  One browser session serves every page and width.
"""

from __future__ import annotations

import os
import shutil
import tempfile
from pathlib import Path

import numpy as np
import pytest

#: seconds in all: started first on the test workers (tests/conftest.py)
pytestmark = pytest.mark.long_running

ROOT = Path(__file__).resolve().parents[1]
WIDTHS = (1024, 1400)

CHROME_FLAGS = ("--headless", "--no-sandbox", "--disable-gpu", "--disable-dev-shm-usage",
                "--disable-background-networking", "--disable-component-update", "--no-first-run",
                "--disable-sync")

#: Every element wider than its parent's content box, and the page's own overflow.
OVERFLOW_SCRIPT = """
const out = [];
const de = document.documentElement;
if (de.scrollWidth > window.innerWidth) {
  out.push('page: scrollWidth ' + de.scrollWidth + ' > innerWidth ' + window.innerWidth);
}
for (const el of document.querySelectorAll('table, figure, img, svg, pre, dl, ul, div, h1, h2, p')) {
  const parent = el.parentElement;
  if (!parent) continue;
  const cs = getComputedStyle(parent);
  const pr = parent.getBoundingClientRect();
  const right = pr.right - parseFloat(cs.paddingRight) - parseFloat(cs.borderRightWidth);
  const r = el.getBoundingClientRect();
  if (r.right > right + 1 || r.width > parent.clientWidth + 1) {
    const text = (el.textContent || el.getAttribute('alt') || '').trim().slice(0, 40);
    out.push(el.tagName.toLowerCase() + ' "' + text + '": right edge ' + Math.round(r.right)
             + ' beyond its container ' + Math.round(right));
  }
}
for (const img of document.images) {
  if (!img.complete || img.naturalWidth === 0) out.push('image not rendered: ' + img.alt);
}
return out;
"""


#: Texts of a chart that overlap another text of the same chart, or a point they label
#: (as the browser lays them out, in its own fonts).
OVERLAP_SCRIPT = """
const out = [];
const hit = (a, b) => a.left < b.right - 1 && b.left < a.right - 1 && a.top < b.bottom - 1 && b.top < a.bottom - 1;
for (const svg of document.querySelectorAll('figure svg')) {
  const name = (svg.getAttribute('aria-label') || '').slice(0, 40);
  const texts = Array.from(svg.querySelectorAll('text'));
  const boxes = texts.map(t => t.getBoundingClientRect());
  for (let i = 0; i < texts.length; i++) {
    for (let j = i + 1; j < texts.length; j++) {
      if (hit(boxes[i], boxes[j])) {
        out.push(name + ': "' + texts[i].textContent + '" overlaps "' + texts[j].textContent + '"');
      }
    }
  }
  for (const t of svg.querySelectorAll('text.point-label')) {
    const b = t.getBoundingClientRect();
    for (const c of svg.querySelectorAll('circle')) {
      const r = c.getBoundingClientRect();
      const x = (r.left + r.right) / 2, y = (r.top + r.bottom) / 2;
      if (b.left < x && x < b.right && b.top < y && y < b.bottom) {
        out.push(name + ': "' + t.textContent + '" covers a point');
      }
    }
  }
}
return out;
"""


def _browser_or_reason():
    """(chromium, chromedriver) paths, or None and why they are missing."""
    try:
        import selenium  # noqa: F401
    except ImportError:
        return None, "selenium is not installed (pip install -e '.[test]')"
    chromium = shutil.which("chromium") or shutil.which("chromium-browser")
    driver = shutil.which("chromedriver")
    if not chromium or not driver:
        return None, ("Debian's chromium and chromium-driver are not installed "
                      "(apt-get install -y chromium chromium-driver)")
    return (chromium, driver), ""


@pytest.fixture(scope="module")
def browser():
    found, reason = _browser_or_reason()
    if found is None:
        if os.environ.get("CI"):
            pytest.fail(f"the report pages need headless Chromium in CI: {reason}")
        pytest.skip(reason)
    from selenium import webdriver
    from selenium.webdriver.chrome.service import Service

    chromium, driver_path = found
    profile = tempfile.mkdtemp(prefix="report-pages-chromium-")
    options = webdriver.ChromeOptions()
    options.binary_location = chromium
    for flag in (*CHROME_FLAGS, f"--user-data-dir={profile}", f"--window-size={WIDTHS[0]},900"):
        options.add_argument(flag)
    driver = webdriver.Chrome(service=Service(executable_path=driver_path), options=options)
    driver.set_page_load_timeout(60)
    try:
        yield driver
    finally:
        driver.quit()
        shutil.rmtree(profile, ignore_errors=True)


def _problems(driver, path: Path, width: int) -> list[str]:
    # the viewport itself, not the window around it: innerWidth is exactly `width`
    driver.execute_cdp_cmd("Emulation.setDeviceMetricsOverride",
                           {"width": width, "height": 900, "deviceScaleFactor": 1, "mobile": False})
    driver.get(path.resolve().as_uri())
    assert driver.execute_script("return window.innerWidth") == width
    return driver.execute_script(OVERFLOW_SCRIPT)


@pytest.fixture(scope="module")
def pages(tmp_path_factory):
    """The demo's study report, the two-dimensional design's study report and a tuning report."""
    from adaptive_engine.bank.item_bank import load_bank
    from adaptive_engine.design.toml_file import read_design
    from adaptive_engine.simulation.population import Population, parse_ability_spec
    from adaptive_engine.simulation.study import run_study
    from adaptive_engine.simulation.tuning import parse_variation, run_tuning_study

    design_file = ROOT / "simulations" / "licensing_exam.toml"
    bank_file = ROOT / "item_banks" / "meridian_valley_operator.csv"
    if not design_file.exists() or not bank_file.exists():
        pytest.skip("shipped demo files missing")
    design, bank = read_design(design_file), load_bank(bank_file)
    out = tmp_path_factory.mktemp("pages")
    run_study(design, bank, population=Population.drawn(parse_ability_spec("normal:0,1"), n_examinees=300, seed=2026),
              out_dir=out / "study", write_administrations=False,
              title="Demo: Meridian Valley water-operator licensing exam")
    # three varied keys: the widest table the tuning page usually gets
    run_tuning_study(design, bank, [parse_variation("stopping.se=0.25,0.3"),
                                    parse_variation("stopping.sprt.indifference=0.1,0.2"),
                                    parse_variation("stopping.max_items=30,40")],
                     population=Population(true_theta=np.random.default_rng(3).standard_normal(40), seed=3),
                     out_dir=out / "tuning")
    from adaptive_engine.simulation.multidimensional_engine import (
        multidimensional_metrics,
        simulate_multidimensional,
        write_study,
    )

    design2, bank2 = read_design(ROOT / "simulations" / "licensing_two_dimensional.toml"), load_bank(
        ROOT / "item_banks" / "meridian_valley_operator_2d.json")
    true2 = np.random.default_rng(4).multivariate_normal([0, 0], [[1, 0.6], [0.6, 1]], size=120)
    result = simulate_multidimensional(design2, bank2, true_theta=true2, seed=4)
    summary = multidimensional_metrics(result)
    summary["settings"] = {"abilities": "correlated_normal:0,1,0.6", "seed": 4}
    write_study(result, summary, out / "study2d")
    return {"study report": out / "study" / "report.html", "tuning report": out / "tuning" / "tuning.html",
            "two-dimensional study report": out / "study2d" / "report.html"}


@pytest.mark.parametrize("width", WIDTHS)
def test_pages_fit_the_window(browser, pages, width):
    for name, path in pages.items():
        assert _problems(browser, path, width) == [], f"{name} at {width} px"


def test_no_text_of_a_figure_covers_another(browser, pages):
    for name, path in pages.items():
        _problems(browser, path, WIDTHS[0])
        assert browser.execute_script("return document.querySelectorAll('figure svg').length") >= 2, name
        assert browser.execute_script(OVERLAP_SCRIPT) == [], name


def test_the_check_finds_an_overflowing_table(browser, tmp_path):
    # the check itself must be able to fail: a table of long unbreakable cells
    cells = "".join(f"<td style='white-space:nowrap'>column {j} holds a long unbreakable text</td>" for j in range(12))
    page = tmp_path / "wide.html"
    page.write_text(f"<!DOCTYPE html><html><body style='max-width:60em'><table><tr>{cells}</tr></table>"
                    "</body></html>")
    found = _problems(browser, page, WIDTHS[0])
    assert any(p.startswith("page:") for p in found) and any(p.startswith("table") for p in found)


def test_the_check_finds_overlapping_chart_texts(browser, tmp_path):
    # the overlap check must be able to fail: two labels on one spot, one over a point
    page = tmp_path / "overlap.html"
    page.write_text("<!DOCTYPE html><html><body><figure><svg viewBox='0 0 200 100' width='200' height='100' "
                    "aria-label='t'><circle cx='52' cy='46' r='4'/><text x='40' y='50'>12, 13</text>"
                    "<text class='point-label' x='45' y='52'>14</text></svg></figure></body></html>")
    _problems(browser, page, WIDTHS[0])
    found = browser.execute_script(OVERLAP_SCRIPT)
    assert any("overlaps" in p for p in found) and any("covers a point" in p for p in found)
