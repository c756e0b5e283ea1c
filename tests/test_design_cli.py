"""``adaptive-engine design check`` and ``design show`` through click's CliRunner.

These check the command layer only (exit codes, messages, help); the validation itself is
checked against its outside references in ``test_design.py``.
"""

from __future__ import annotations

import tomllib
from pathlib import Path

import pytest
from click.testing import CliRunner

from adaptive_engine.cli import main
from adaptive_engine.design import Scoring
from adaptive_engine.design.toml_file import parse_design, read_design

REPO = Path(__file__).resolve().parents[1]
SIMULATIONS = REPO / "simulations"
OPERATOR_BANK = REPO / "item_banks" / "meridian_valley_operator.csv"


def run(*args):
    return CliRunner().invoke(main, list(args))


def small_bank(path: Path) -> Path:
    rows = ["item_id,model,a,b,area,enemy_group,status"]
    rows += [f"I{i},2PL,{0.6 + 0.1 * i:.1f},{-1 + 0.2 * i:.1f},{'x' if i % 2 else 'y'},,operational" for i in range(10)]
    rows.append("P1,2PL,1.0,0.0,x,,pretest")
    path.write_text("\n".join(rows) + "\n")
    return path


def test_check_without_bank_prints_one_line_per_section(tmp_path):
    result = run("design", "check", str(SIMULATIONS / "minimal.toml"))
    assert result.exit_code == 0, result.output
    lines = result.output.strip().splitlines()
    assert lines[0].startswith("design minimal.toml: valid")
    assert [line.split(":")[0] for line in lines[1:]] == [
        "opening", "scoring", "selection", "exposure", "blueprint", "stopping", "reporting"]


def test_check_against_a_fitting_bank_exits_0(tmp_path):
    design = tmp_path / "d.toml"
    design.write_text("[blueprint]\npretest_positions = [3]\n[blueprint.areas.x]\nmin = 2\n"
                      "[stopping]\nmax_items = 5\nse = 0.3\n")
    result = run("design", "check", str(design), "--bank", str(small_bank(tmp_path / "bank.csv")))
    assert result.exit_code == 0, result.output
    assert "fits bank" in result.output and "11 items, 1 pretest" in result.output
    assert "pretest items at positions 3" in result.output


def test_check_lists_every_problem_with_exit_2(tmp_path):
    design = tmp_path / "d.toml"
    design.write_text('[stopping]\nse = 0\nmax_items = "ten"\n[selection]\ncriterion = "maxinfo"\n')
    result = run("design", "check", str(design))
    assert result.exit_code == 2
    assert "[stopping] se: must lie in [0.001, 10.0], got 0.0" in result.stderr
    assert "[stopping] max_items: expected a whole number" in result.stderr
    assert "[selection] criterion: unknown value 'maxinfo'; allowed values:" in result.stderr
    assert result.stdout == ""


def test_check_reports_bank_misfits_with_exit_2(tmp_path):
    design = tmp_path / "d.toml"
    design.write_text("[blueprint.areas.z]\nmin = 1\n[stopping]\nmax_items = 12\n")
    result = run("design", "check", str(design), "--bank", str(small_bank(tmp_path / "bank.csv")))
    assert result.exit_code == 2
    assert "[blueprint.areas.z]: area 'z' is not in the bank" in result.stderr
    assert "[stopping] max_items:" in result.stderr and "at most 10" in result.stderr


def test_check_syntax_error_and_missing_files(tmp_path):
    design = tmp_path / "bad.toml"
    design.write_text("[stopping]\nmax_items = \n")
    result = run("design", "check", str(design))
    assert result.exit_code == 2 and "bad.toml line 2: TOML syntax error" in result.stderr
    result = run("design", "check", str(tmp_path / "absent.toml"))
    assert result.exit_code == 2 and "no such design file" in result.stderr
    result = run("design", "check", str(SIMULATIONS / "minimal.toml"), "--bank", str(tmp_path / "absent.csv"))
    assert result.exit_code == 2 and "absent.csv" in result.stderr


def test_show_prints_the_fully_defaulted_design_as_toml():
    result = run("design", "show", str(SIMULATIONS / "minimal.toml"))
    assert result.exit_code == 0, result.output
    doc = tomllib.loads(result.output)  # oracle: the standard library's TOML reader
    # every default is written out, whatever the contract classes set it to
    assert doc["scoring"]["prior_sd"] == 1.0 and doc["scoring"]["grid_points"] == Scoring().grid_points
    assert doc["selection"]["criterion"] == "max_fisher_information" and doc["exposure"]["method"] == "none"
    assert doc["stopping"] == {"min_items": 5, "max_items": 15, "se": 0.3}
    assert parse_design(result.output, source="minimal.toml") == read_design(SIMULATIONS / "minimal.toml")


def test_show_refuses_a_bad_design(tmp_path):
    design = tmp_path / "d.toml"
    design.write_text("[scoring]\nmethod = 'bayes'\n")
    result = run("design", "show", str(design))
    assert result.exit_code == 2 and "[scoring] method" in result.stderr and result.stdout == ""


@pytest.mark.skipif(not OPERATOR_BANK.exists(), reason="demo bank not generated (item_banks/make_demo_banks.py)")
def test_shipped_demo_design_checks_clean_against_the_demo_bank():
    result = run("design", "check", str(SIMULATIONS / "licensing_exam.toml"), "--bank", str(OPERATOR_BANK))
    assert result.exit_code == 0, result.output
    assert "SPRT at cut -0.2" in result.output and "final WLE" in result.output


@pytest.mark.parametrize("command", [["design"], ["design", "check"], ["design", "show"]])
def test_every_design_command_has_help(command):
    result = run(*command, "--help")
    assert result.exit_code == 0
    group = main
    for name in command:
        group = group.commands[name] if hasattr(group, "commands") else group
    assert group.help and group.help.strip()
    assert "Usage:" in result.output


@pytest.mark.parametrize("target, fragment", [("/dev/zero", "not a regular file"),
                                              ("a\\u0000b.csv", "NUL byte")])
def test_check_refuses_exposure_parameters_that_are_no_file(tmp_path, target, fragment):
    # parameters = "/dev/zero" grew design check to 21 GB; a NUL byte raised a raw ValueError
    text = (SIMULATIONS / "sympson_hetter.toml").read_text()
    design = tmp_path / "hostile.toml"
    design.write_text("\n".join(f'parameters_file = "{target}"' if line.startswith("parameters_file") else line
                                for line in text.splitlines()) + "\n")
    result = run("design", "check", str(design), "--bank", str(OPERATOR_BANK))
    assert result.exit_code == 2, result.output
    assert "[exposure] parameters_file: " in result.output and fragment in result.output
