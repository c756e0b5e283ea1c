"""The ``adaptive-engine bank`` commands, through click's CliRunner."""

from __future__ import annotations

import csv
import io
import json
from pathlib import Path

import click
import numpy as np
import pytest
from click.testing import CliRunner

from adaptive_engine.bank import load_bank
from adaptive_engine.cli import main
from adaptive_engine.irt import models
from optional_extras import requires_matplotlib

REPO = Path(__file__).resolve().parents[1]
OPERATOR = REPO / "item_banks" / "meridian_valley_operator.json"
OPERATOR_CSV = REPO / "item_banks" / "meridian_valley_operator.csv"
SURVEY = REPO / "item_banks" / "staff_climate_survey.csv"

BAD_CSV = (
    "item_id,model,a,b,c,d,area\n"
    "Q1,3PL,1.0,0.0,0.2,1,pumps\n"
    "Q2,3PL,-1.0,0.0,0.2,1,pumps\n"       # line 3: a <= 0
    "Q3,4PL,1.0,0.0,0.5,0.4,pumps\n"      # line 4: d < c
    "Q1,2PL,1.0,0.0,,,pumps\n"            # line 5: duplicate id
    "Q5,6PL,1.0,0.0,,,pumps\n"            # line 6: unknown model
    "Q6,2PL,1.0,hard,,,pumps\n"           # line 7: non-numeric b
)


def run(*args):
    args = [str(a) for a in args]
    if args[:2] == ["bank", "curves"] and "--format" not in args and "--help" not in args:
        args += ["--format", "csv"]  # the full-precision CSV these tests read (people get a table)
    return CliRunner().invoke(main, args, catch_exceptions=False)


def test_check_summarises_the_demo_exam():
    result = run("bank", "check", OPERATOR)
    assert result.exit_code == 0, result.output
    out = result.output
    assert "500 items" in out
    bank = load_bank(OPERATOR)
    for m in ("2PL", "3PL", "4PL"):
        assert f"{m} {int(np.sum(bank.model == m))}" in out
    assert "source_water 100" in out and "safety_and_regulations 100" in out
    assert f"pretest items: {int(np.sum(bank.status == 'pretest'))}" in out
    assert "enemy groups: 15" in out and "item sets: 10" in out
    assert "SE < 0.3" in out and "theta in [" in out


def test_check_precision_range_agrees_with_a_direct_sum():
    # oracle: 1 / sqrt(summed item information) computed here from models.information
    result = run("bank", "check", SURVEY)
    assert result.exit_code == 0, result.output
    line = [x for x in result.output.splitlines() if x.startswith("SE < 0.3")][0]
    lo, hi = (float(v) for v in line.split("theta in [")[1].rstrip("]").split(","))
    bank = load_bank(SURVEY)
    se = lambda t: 1 / np.sqrt(models.information(*models.outer(bank.params, np.array([t]))).sum())  # noqa: E731
    assert se(lo + 0.02) < 0.3 < se(lo - 0.02)
    assert se(hi - 0.02) < 0.3 < se(hi + 0.02)


def test_check_lists_every_problem_with_its_location(tmp_path):
    path = tmp_path / "bad.csv"
    path.write_text(BAD_CSV)
    result = CliRunner().invoke(main, ["bank", "check", str(path)])
    assert result.exit_code == 2
    err = result.stderr if hasattr(result, "stderr") else result.output
    for line_no, fragment in ((3, "a must be > 0"), (4, "upper asymptote d"), (5, "duplicate item id"),
                              (6, "unknown model '6PL'"), (7, "b is not a number")):
        assert any(f"bad.csv line {line_no}" in x and fragment in x for x in err.splitlines()), err
    problem_lines = [x.strip() for x in err.splitlines() if x.strip().startswith("bad.csv line")]
    assert len(problem_lines) == 5
    assert not any(x.startswith("bad.csv line 2") for x in problem_lines)  # the good row


def test_check_reports_a_missing_file():
    result = CliRunner().invoke(main, ["bank", "check", "no_such_bank.csv"])
    assert result.exit_code == 2
    assert "no such file" in result.output


def parse_csv(text):
    rows = list(csv.reader(io.StringIO(text)))
    return rows[0], np.array(rows[1:], dtype=float)


def test_curves_csv_matches_summed_item_information():
    result = run("bank", "curves", SURVEY, "--from", -2, "--to", 2, "--step", 0.5)
    assert result.exit_code == 0, result.output
    header, values = parse_csv(result.output)
    assert header == ["theta", "information", "se"]
    np.testing.assert_allclose(values[:, 0], np.arange(-2, 2.01, 0.5))
    bank = load_bank(SURVEY)
    direct = models.information(*models.outer(bank.params, values[:, 0])).sum(axis=0)
    np.testing.assert_allclose(values[:, 1], direct, rtol=1e-12)
    np.testing.assert_allclose(values[:, 2], 1 / np.sqrt(direct), rtol=1e-12)


def test_curves_by_area_add_up():
    result = run("bank", "curves", OPERATOR_CSV, "--step", 1, "--by-area")
    assert result.exit_code == 0, result.output
    header, values = parse_csv(result.output)
    areas = load_bank(OPERATOR_CSV).areas
    assert header == ["theta", "information", "se"] + [f"information_{a}" for a in areas]
    np.testing.assert_allclose(values[:, 3:].sum(axis=1), values[:, 1], rtol=1e-10)
    assert values.shape[0] == 9  # -4 .. 4 by 1


def test_curves_json_by_area():
    result = run("bank", "curves", SURVEY, "--format", "json", "--by-area", "--from", 0, "--to", 1)
    assert result.exit_code == 0, result.output
    doc = json.loads(result.output)
    assert doc["theta"] == [0.0, 0.25, 0.5, 0.75, 1.0]
    assert set(doc["by_area"]) == {"workload", "team_support", "leadership", "wellbeing"}
    summed = np.sum([v["information"] for v in doc["by_area"].values()], axis=0)
    np.testing.assert_allclose(summed, doc["information"], rtol=1e-10)
    np.testing.assert_allclose(doc["se"], 1 / np.sqrt(doc["information"]), rtol=1e-12)


@pytest.mark.parametrize("args, where", [
    (["--step", "0"], "--step"),
    (["--from", "2", "--to", "1"], "--to"),
    (["--step", "1e-9"], "--step"),
])
def test_curves_refuses_bad_grids(args, where):
    result = CliRunner().invoke(main, ["bank", "curves", str(SURVEY), *args])
    assert result.exit_code == 2
    assert where in result.output


@requires_matplotlib
def test_curves_plot(tmp_path):
    png = tmp_path / "info.png"
    result = run("bank", "curves", OPERATOR, "--by-area", "--plot", png)
    assert result.exit_code == 0, result.output
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert [p.name for p in tmp_path.iterdir()] == ["info.png"]


@requires_matplotlib
def test_curves_plot_needs_png_suffix(tmp_path):
    result = CliRunner().invoke(main, ["bank", "curves", str(SURVEY), "--plot", str(tmp_path / "x.pdf")])
    assert result.exit_code == 2 and "--plot" in result.output
    assert list(tmp_path.iterdir()) == []


@pytest.mark.parametrize("suffix", [".csv", ".json", ".db"])
def test_convert_round_trips(tmp_path, suffix):
    out = tmp_path / f"copy{suffix}"
    result = run("bank", "convert", OPERATOR, out)
    assert result.exit_code == 0, result.output
    assert "wrote 500 items" in result.output
    a, b = load_bank(OPERATOR), load_bank(out)
    assert list(a.item_ids) == list(b.item_ids)
    np.testing.assert_array_equal(a.c, b.c)
    assert a.enemy_groups == b.enemy_groups


def test_convert_bad_input_writes_nothing(tmp_path):
    src = tmp_path / "bad.csv"
    src.write_text(BAD_CSV)
    out = tmp_path / "out.json"
    result = CliRunner().invoke(main, ["bank", "convert", str(src), str(out)])
    assert result.exit_code == 2 and "bad.csv line 3" in result.output
    assert not out.exists()
    result = CliRunner().invoke(main, ["bank", "convert", str(SURVEY), str(tmp_path / "out.xlsx")])
    assert result.exit_code == 2 and "unknown bank file type" in result.output
    assert sorted(p.name for p in tmp_path.iterdir()) == ["bad.csv"]


def _walk(command, path=()):
    yield path, command
    if isinstance(command, click.Group):
        for name, sub in command.commands.items():
            yield from _walk(sub, path + (name,))


def test_every_command_has_help():
    missing = [" ".join(path) or "(root)" for path, cmd in _walk(main)
               if not (cmd.help or "").strip() and not (cmd.short_help or "").strip()]
    assert not missing, f"commands without help: {missing}"
    # and --help works for each of them
    for path, _ in _walk(main):
        result = CliRunner().invoke(main, [*path, "--help"])
        assert result.exit_code == 0 and "Usage" in result.output, path


def test_bank_group_lists_its_commands():
    result = run("bank", "--help")
    for name in ("check", "curves", "convert"):
        assert name in result.output


def test_curves_plot_without_matplotlib_is_a_clear_error(tmp_path, monkeypatch):
    import sys

    # a None entry in sys.modules makes "import matplotlib" raise ImportError
    monkeypatch.setitem(sys.modules, "matplotlib", None)
    monkeypatch.setitem(sys.modules, "matplotlib.pyplot", None)
    result = CliRunner().invoke(main, ["bank", "curves", str(SURVEY), "--plot", str(tmp_path / "x.png")])
    assert result.exit_code == 2
    assert "--plot" in result.output and "matplotlib" in result.output and "plots" in result.output
    assert list(tmp_path.iterdir()) == []


# ---------------------------------------------------------------------------------------
# hostile files: exit 2 with LOCATION: problem, nothing written


def test_check_and_convert_refuse_a_lone_surrogate_with_its_location(tmp_path):
    doc = json.loads(OPERATOR.read_text())
    text = json.dumps(doc).replace('"label": "Drought storage planning', '"label": "Drought \\ud800 planning', 1)
    path = tmp_path / "surrogate.json"
    path.write_text(text)
    for args in (("bank", "check", path), ("bank", "convert", path, tmp_path / "out.csv")):
        result = CliRunner().invoke(main, [str(a) for a in args])
        assert result.exit_code == 2, result.output
        assert "surrogate.json items[0].label: the text holds \\ud800" in result.output
    assert not (tmp_path / "out.csv").exists()


@pytest.mark.parametrize("text", ["[" * 2000 + "]" * 2000,
                                  '{"items": [{"item_id": "Q1", "model": "2PL", "a": ' + "9" * 5001 + ', "b": 0}]}'])
def test_check_refuses_deep_nesting_and_huge_integers(tmp_path, text):
    path = tmp_path / "hostile.json"
    path.write_text(text)
    result = CliRunner().invoke(main, ["bank", "check", str(path)])
    assert result.exit_code == 2, result.output  # a raw RecursionError / ValueError gave 1
    assert "hostile.json" in result.output


def test_check_refuses_a_pipe_instead_of_waiting_on_it(tmp_path):
    # A FIFO path made bank check wait for a writer for ever; run in a child with a timeout
    import os
    import subprocess
    import sys

    fifo = tmp_path / "bank.json"
    os.mkfifo(fifo)
    env = dict(os.environ, PYTHONPATH=str(REPO))
    done = subprocess.run([sys.executable, "-m", "adaptive_engine", "bank", "check", str(fifo)],
                          capture_output=True, text=True, timeout=60, env=env)
    assert done.returncode == 2
    assert f"{fifo}: not a regular file" in done.stderr


def test_summary_works_in_blocks_of_items(monkeypatch):
    # bank check once held every item on the 1,201-point grid at once (60 KB per item:
    # 100,000 items took gigabytes); information is now summed a block of items at a time
    from adaptive_engine.bank import summary as bank_report
    from adaptive_engine.irt.curves import test_information

    bank = load_bank(OPERATOR)
    calls = []
    real = bank_report.item_information

    def recording(source, theta, items):
        out = real(source, theta, items)
        calls.append(out.size * bank.max_categories)
        return out

    monkeypatch.setattr(bank_report, "INFORMATION_BLOCK_CELLS", 20_000)
    monkeypatch.setattr(bank_report, "item_information", recording)
    summary = bank_report.summarize_bank(bank)
    assert len(calls) > 10 and max(calls) <= 20_000
    grid = np.round(np.arange(-6.0, 6.0 + 0.005, 0.01), 10)
    whole = test_information(bank, grid, np.flatnonzero(bank.status == "operational"))
    expected = bank_report.precise_ranges(grid, whole, 1 / 0.3**2)
    np.testing.assert_allclose(summary.precise_ranges, expected, rtol=1e-12)
    curves = bank_report.information_curves(bank, grid[::50], by_area=True, include_pretest=True)
    np.testing.assert_allclose(curves.information, test_information(bank, grid[::50]), rtol=1e-12)
    by_area = test_information(bank, grid[::50], by_area=True)
    for area in bank.areas:
        np.testing.assert_allclose(curves.by_area[area], by_area[area], rtol=1e-12)


def test_curves_by_area_are_bounded_by_their_size(tmp_path):
    # one curve per area and point: a bank with an area per item would ask for items x points
    path = tmp_path / "areas.csv"
    path.write_text("item_id,model,a,b,area\n" + "".join(f"Q{k},2PL,1,0,area{k}\n" for k in range(25)))
    result = CliRunner().invoke(main, ["bank", "curves", str(path), "--by-area", "--from", "-5", "--to", "5",
                                       "--step", "0.0001"])
    assert result.exit_code == 2
    assert "--by-area: 25 content areas x 100,001 ability points is more than 2,000,000 values" in result.output
    result = CliRunner().invoke(main, ["bank", "curves", str(path), "--by-area", "--format", "json"])
    assert result.exit_code == 0 and len(json.loads(result.output)["by_area"]) == 25
