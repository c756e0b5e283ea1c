"""The TOML design file: reading, located validation, writing back, fit to a bank.

Outside references used here:

* the TOML v1.0.0 specification, with the standard library's ``tomllib`` as the oracle
  for what our writer emits;
* ``scipy.optimize.milp`` as the oracle for the largest number of items one examinee can
  get when at most one item per enemy group is allowed (a set-packing problem);
* the demo banks in ``item_banks/`` are invented and serve only to check that the shipped
  example designs fit them -- never as a reference for numbers.
"""

from __future__ import annotations

import json
import math
import tomllib
from pathlib import Path

import attrs
import numpy as np
import pytest
from hypothesis import HealthCheck, assume, given, settings
from hypothesis import strategies as st

from adaptive_engine.bank import bank_from_records, load_bank
from adaptive_engine.design import (
    AreaRule,
    Blueprint,
    ConfidenceRule,
    CutScore,
    Design,
    Exposure,
    ExposureMethod,
    ExtremePatternMethod,
    Opening,
    Reporting,
    ScaleRule,
    Scoring,
    ScoringMethod,
    Selection,
    SprtRule,
    Stopping,
)
from adaptive_engine.design.bank_fit import (
    check_design_against_bank,
    describe_design,
    require_design_fits_bank,
    usable_item_count,
)
from adaptive_engine.design.exposure_parameters import parse_exposure_file, parse_exposure_parameters
from adaptive_engine.design.toml_file import (
    design_as_dict,
    design_from_dict,
    design_to_toml,
    parse_design,
    read_design,
    validate_design,
)
from adaptive_engine.errors import AdaptiveEngineError, DesignError
from adaptive_engine.kernel.final_report import scaled_score

REPO = Path(__file__).resolve().parents[1]
SIMULATIONS = REPO / "simulations"
BANKS = REPO / "item_banks"

MINIMAL = """\
[opening]
theta = 0.0
[scoring]
method = "eap"
[selection]
criterion = "max_fisher_information"
[exposure]
method = "none"
[stopping]
min_items = 5
max_items = 15
se = 0.3
"""


def problems_of(text: str, **kwargs) -> dict[str, str]:
    """Parse ``text`` expecting a DesignError; location -> message."""
    with pytest.raises(DesignError) as info:
        parse_design(text, **kwargs)
    return {p.location: p.message for p in info.value.problems}


# ----------------------------------------------------------------------------------------
# the minimal design


def test_minimal_design_is_accepted_and_means_what_the_brief_says():
    design = parse_design(MINIMAL)
    assert design.opening.theta == 0.0 and design.opening.random_theta is None
    assert design.scoring.method == "eap"
    assert (design.scoring.prior_mean, design.scoring.prior_sd) == (0.0, 1.0)
    assert design.selection.criterion == "max_fisher_information"
    assert design.exposure.method == "none"
    assert design.exposure_parameters is None
    assert (design.stopping.min_items, design.stopping.max_items, design.stopping.se) == (5, 15, 0.3)
    assert design.stopping.sprt is None and design.stopping.confidence_interval is None
    assert design.blueprint.areas == ()
    assert design.final_method == "eap"
    assert design == Design(stopping=Stopping(min_items=5, max_items=15, se=0.3), source="design")


def test_empty_file_is_the_all_default_design():
    assert parse_design("", source="x") == Design(source="x")


def test_minimal_example_file_matches_the_brief():
    design = read_design(SIMULATIONS / "minimal.toml")
    assert design == attrs.evolve(parse_design(MINIMAL), source="minimal.toml")


def test_plain_words_summary_has_one_line_per_section():
    lines = describe_design(parse_design(MINIMAL))
    assert [line.split(":")[0] for line in lines] == [
        "opening", "scoring", "selection", "exposure", "blueprint", "stopping", "reporting"]
    assert "SE <= 0.3" in lines[5] and "15 scored items" in lines[5] and "before 5" in lines[5]


# ----------------------------------------------------------------------------------------
# refusals, each located at section and key

BAD_INPUTS = [
    # (TOML, location, fragment of the message)
    ("[stopping]\nse_target = 0.3\n", "[stopping] se_target", "unknown key; known keys: min_items"),
    ("[stoping]\nse = 0.3\n", "[stoping]", "unknown section; known sections: opening"),
    ("theta = 0.0\n", "[top level] theta", "outside any section"),
    ("opening = 3\n", "[top level] opening", "expected a table"),
    ("[stopping]\nse = \"small\"\n", "[stopping] se", "expected a number, got a string"),
    ("[stopping]\nse = true\n", "[stopping] se", "expected a number, got true/false"),
    ("[stopping]\nse = 0.0\n", "[stopping] se", "must lie in [0.001, 10.0], got 0.0"),
    ("[stopping]\nse = -0.1\n", "[stopping] se", "must lie in [0.001, 10.0]"),
    ("[stopping]\nse = nan\n", "[stopping] se", "finite"),
    ("[stopping]\nmax_items = 2.5\n", "[stopping] max_items", "whole number"),
    ("[stopping]\nmin_items = 0\n", "[stopping] min_items", "must lie in [1, 1000]"),
    ("[stopping]\nmin_items = 20\nmax_items = 10\n", "[stopping] min_items", "exceeds max_items"),
    ("[stopping.sprt]\ncut = 0.0\nalpha = 0.5\n", "[stopping.sprt] alpha", "strictly between 0 and 0.5"),
    ("[stopping.sprt]\ncut = 0.0\nbeta = 0\n", "[stopping.sprt] beta", "strictly between 0 and 0.5"),
    ("[stopping.sprt]\nalpha = 0.05\n", "[stopping.sprt] cut", "missing key"),
    ("[stopping.sprt]\ncut = 5.9\nindifference = 0.2\n", "[stopping.sprt] cut", "outside the ability grid"),
    ("[stopping.confidence_interval]\ncut = 0.0\nconfidence = 1.0\n",
     "[stopping.confidence_interval] confidence", "must lie in (0, 0.9999]"),
    ("[stopping]\nsprt = 1\n", "[stopping] sprt", "expected a table"),
    ("[scoring]\nprior_sd = 0\n", "[scoring] prior_sd", "must lie in [0.01, 100.0]"),
    ("[scoring]\ngrid_points = 11\n", "[scoring] grid_points", "must lie in [21,"),
    ("[scoring]\ngrid_min = 3.0\ngrid_max = -3.0\n", "[scoring] grid_max", "above grid_min"),
    ("[scoring]\nprior_mean = 9.0\n", "[scoring] prior_mean", "outside the ability grid"),
    ("[scoring]\nmethod = \"EAP\"\n", "[scoring] method", "allowed values: mle, map, eap, wle"),
    ("[scoring]\nextreme_pattern_method = \"wle\"\n", "[scoring] extreme_pattern_method",
     "allowed values: eap, map, fixed_step"),
    ("[selection]\ncriterion = \"maxinfo\"\n", "[selection] criterion",
     "unknown value 'maxinfo'; allowed values: max_fisher_information, posterior_weighted_information"),
    ("[selection]\nstrata = 0\n", "[selection] strata", "must lie in [1, 1000]"),
    ("[selection]\nb_blocking = \"yes\"\n", "[selection] b_blocking", "expected true or false"),
    ("[exposure]\ncandidates = 0\n", "[exposure] candidates", "must lie in [1, 1000]"),
    ("[exposure]\nmethod = \"sympson_hetter\"\n", "[exposure] parameters_file", "needs a parameters CSV"),
    ("[exposure]\nmethod = \"shuffle\"\n", "[exposure] method", "allowed values: none, randomesque"),
    ("[exposure]\nparameters_file = \"\"\n", "[exposure] parameters_file", "must not be empty"),
    ("[opening]\ntheta = 0.5\nrandom_theta = [-0.5, 0.5]\n", "[opening] random_theta", "not both"),
    ("[opening]\nrandom_theta = [0.5, -0.5]\n", "[opening] random_theta", "low end must be below"),
    ("[opening]\nrandom_theta = [0.5]\n", "[opening] random_theta", "two numbers"),
    ("[opening]\nfirst_item_candidates = 0\n", "[opening] first_item_candidates", "must lie in [1, 1000]"),
    ("[opening]\ntheta = 7.5\n", "[opening] theta", "outside the ability grid"),
    ("[blueprint]\nmethod = \"weighted\"\n", "[blueprint] method",
     "allowed values: most_behind_area, max_priority_index"),
    ("[blueprint]\npretest_positions = [0, 3]\n", "[blueprint] pretest_positions", "1-based"),
    ("[blueprint]\npretest_positions = [3, 3]\n", "[blueprint] pretest_positions", "must not repeat"),
    ("[blueprint]\npretest_positions = [31]\n[stopping]\nmax_items = 30\n",
     "[blueprint] pretest_positions", "can never be reached"),
    ("[blueprint.areas.source_water]\nmin = 5\nmax = 2\n", "[blueprint.areas.source_water] max", "below min"),
    ("[blueprint.areas.source_water]\nshare = 1.5\n", "[blueprint.areas.source_water] share", "(0, 1]"),
    ("[blueprint.areas.source_water]\nshare = 0.5\nmin = 2\n", "[blueprint.areas.source_water] share", "not both"),
    ("[blueprint.areas.source_water]\nminimum = 2\n", "[blueprint.areas.source_water] minimum", "unknown key"),
    ("[blueprint.areas.a]\nshare = 0.6\n[blueprint.areas.b]\nshare = 0.6\n", "[blueprint.areas]",
     "shares add up to 1.2"),
    ("[blueprint.areas.a]\nmin = 20\n[blueprint.areas.b]\nmin = 20\n", "[blueprint.areas]", "minimums add up to 40"),
    ("[blueprint.areas]\nsource_water = 3\n", "[blueprint.areas] source_water", "expected a table"),
    ("[reporting]\nfinal_method = \"bayes\"\n", "[reporting] final_method", "allowed values"),
    ("[reporting]\nconfidence = 95\n", "[reporting] confidence", "must lie in (0, 0.9999]"),
    ("[reporting.scale]\nslope = 0\n", "[reporting.scale] slope", "must be 0.0001 to 10000 in size"),
    ("[reporting.scale]\ndecimals = -1\n", "[reporting.scale] decimals", "must lie in [0,"),
    ("[reporting.scale]\nmin = 800\nmax = 200\n", "[reporting.scale] max", "above min"),
    ("[[reporting.cut_scores]]\nname = \"licence\"\n", "[[reporting.cut_scores]] #1 theta", "missing key"),
    ("[[reporting.cut_scores]]\nname = \"x\"\ntheta = 0.0\nlevel = 2\n",
     "[[reporting.cut_scores]] #1 level", "unknown key"),
    ("[[reporting.cut_scores]]\nname = \"x\"\ntheta = 0.0\n[[reporting.cut_scores]]\nname = \"x\"\ntheta = 1.0\n",
     "[[reporting.cut_scores]] #2 name", "repeats"),
    ("[reporting]\ncut_scores = 3\n", "[reporting] cut_scores", "array of tables"),
    # values outside the ranges a design may use (docs/designs.md), each named where it is
    ("[scoring]\ngrid_min = -1e300\ngrid_max = 1e300\ngrid_points = 20001\n", "[scoring] grid_min",
     "must lie in [-20, 20], got -1e+300"),
    ("[scoring]\ngrid_max = 1e300\n", "[scoring] grid_max", "must lie in [-20, 20]"),
    ("[scoring]\ngrid_points = 20001\n", "[scoring] grid_points", "must lie in [21, 2001]"),
    ("[scoring]\nprior_mean = 1e300\n", "[scoring] prior_mean", "must lie in [-20, 20]"),
    ("[scoring]\nprior_sd = 1e300\n", "[scoring] prior_sd", "must lie in [0.01, 100.0]"),
    ("[scoring]\nfixed_step = 50\n", "[scoring] fixed_step", "must lie in [0.01, 5.0]"),
    ("[opening]\ntheta = -1e300\n", "[opening] theta", "must lie in [-20, 20]"),
    ("[selection]\nkl_interval = 1e300\n", "[selection] kl_interval", "must lie in [0.01, 10.0]"),
    ("[exposure]\ncandidates = 9223372036854775807\n", "[exposure] candidates", "must lie in [1, 1000]"),
    ("[exposure]\nacceleration = 1e-300\n", "[exposure] acceleration", "must lie in [0.01, 100.0]"),
    ("[stopping]\nmax_items = 100000000\n", "[stopping] max_items", "must lie in [1, 1000]"),
    ("[stopping]\ntime_limit = 1e300\n", "[stopping] time_limit", "must lie in (0, 1e+07]"),
    ("[stopping]\nmin_information = 1e300\n", "[stopping] min_information", "must lie in [1e-06, 10000.0]"),
    ("[stopping.sprt]\ncut = 1e300\n", "[stopping.sprt] cut", "must lie in [-20, 20]"),
    ("[stopping.sprt]\ncut = 0.0\nindifference = 1e300\n", "[stopping.sprt] indifference", "must lie in [0.01, 5.0]"),
    ("[stopping.confidence_interval]\ncut = 0.0\nconfidence = 0.99999999\n",
     "[stopping.confidence_interval] confidence", "must lie in (0, 0.9999]"),
    ("[reporting.scale]\nslope = 1e308\nintercept = 1e308\n", "[reporting.scale] slope", "10000 in size"),
    ("[reporting.scale]\nslope = 1e308\nintercept = 1e308\n", "[reporting.scale] intercept",
     "must lie in [-1e+06, 1e+06]"),
    ("[reporting.scale]\nmin = -1e300\n", "[reporting.scale] min", "must lie in [-1e+07, 1e+07]"),
    ("[reporting]\nperson_fit_threshold = -1e300\n", "[reporting] person_fit_threshold", "must lie in [-10, 10]"),
    ("[[reporting.cut_scores]]\nname = \"x\"\ntheta = 1e300\n", "[[reporting.cut_scores]] #1 theta",
     "must lie in [-20, 20]"),
]


@pytest.mark.parametrize("text, location, fragment", BAD_INPUTS, ids=[b[1] + " " + b[2][:20] for b in BAD_INPUTS])
def test_bad_input_is_refused_naming_section_and_key(text, location, fragment):
    found = problems_of(text)
    assert location in found, found
    assert fragment in found[location]


def test_unknown_key_lists_the_known_keys_and_subtables():
    found = problems_of("[stopping]\nse_target = 0.3\n")
    message = found["[stopping] se_target"]
    for key in ("min_items", "max_items", "se", "se_reduction", "min_information", "time_limit",
                "[stopping.sprt]", "[stopping.confidence_interval]"):
        assert key in message


def test_all_problems_are_reported_together():
    text = "[scoring]\nmethod = \"maxlik\"\nprior_sd = -1\n[selection]\nstrata = \"four\"\n[nonsense]\n"
    found = problems_of(text)
    assert set(found) == {"[scoring] method", "[scoring] prior_sd", "[selection] strata", "[nonsense]"}


def test_errors_are_value_errors_of_the_project():
    with pytest.raises(ValueError) as info:
        parse_design("[stopping]\nse = 0\n")
    assert isinstance(info.value, AdaptiveEngineError)


def test_toml_syntax_error_names_the_line():
    found = problems_of("[stopping]\nmin_items = 5\nmax_items = \n", source="broken.toml")
    assert list(found) == ["broken.toml line 3"]
    assert "TOML syntax error" in found["broken.toml line 3"]


def test_duplicate_key_is_a_syntax_error_with_its_line():
    found = problems_of("[stopping]\nse = 0.3\nse = 0.4\n", source="d.toml")
    assert list(found) == ["d.toml line 3"]


def test_missing_and_non_utf8_files(tmp_path):
    with pytest.raises(DesignError, match="no such design file"):
        read_design(tmp_path / "absent.toml")
    path = tmp_path / "latin.toml"
    path.write_bytes(b"[stopping]\n# caf\xe9\n")
    with pytest.raises(DesignError, match="not UTF-8"):
        read_design(path)


# ----------------------------------------------------------------------------------------
# Sympson-Hetter parameter file


def test_exposure_parameters_are_loaded_relative_to_the_design(tmp_path):
    (tmp_path / "params").mkdir()
    (tmp_path / "params" / "sh.csv").write_text("item_id,exposure_parameter\nA,0.5\nB,1\n\nC,0.25\n")
    design_path = tmp_path / "d.toml"
    design_path.write_text('[exposure]\nmethod = "sympson_hetter"\nparameters_file = "params/sh.csv"\n')
    design = read_design(design_path)
    assert design.exposure_parameters == {"A": 0.5, "B": 1.0, "C": 0.25}
    # the stored path stays as written, so the design file can move with its CSV
    assert design.exposure.parameters_file == "params/sh.csv"


def test_bad_exposure_parameter_rows_are_named_by_line():
    text = "item_id,exposure_parameter\nA,0.5\nB,1.5\nC,abc\nA,0.2\n,0.3\nD,0.1,9\n"
    with pytest.raises(DesignError) as info:
        parse_exposure_parameters(text, source="sh.csv")
    found = {p.location: p.message for p in info.value.problems}
    assert set(found) == {"sh.csv line 3", "sh.csv line 4", "sh.csv line 5", "sh.csv line 6", "sh.csv line 7"}
    assert "[0, 1]" in found["sh.csv line 3"]
    assert "not a number" in found["sh.csv line 4"]
    assert "first on line 2" in found["sh.csv line 5"]


def test_exposure_parameter_header_and_missing_file(tmp_path):
    with pytest.raises(DesignError, match="expected the header"):
        parse_exposure_parameters("id,k\nA,0.5\n", source="sh.csv")
    with pytest.raises(DesignError) as info:
        parse_design('[exposure]\nmethod = "sympson_hetter"\nparameters_file = "nope.csv"\n', base_dir=tmp_path)
    assert info.value.location == "[exposure] parameters_file"


def test_design_file_with_a_byte_order_mark_is_read(tmp_path):
    # bank files accepted a UTF-8 byte order mark while designs were refused with a syntax error
    path = tmp_path / "bom.toml"
    path.write_bytes(b"\xef\xbb\xbf" + (SIMULATIONS / "licensing_exam.toml").read_bytes())
    assert read_design(path).stopping == read_design(SIMULATIONS / "licensing_exam.toml").stopping
    assert parse_design("\ufeff[stopping]\nmax_items = 12\n").stopping.max_items == 12


@pytest.mark.parametrize("text, location, fragment", [
    # tomllib raised RecursionError / ValueError ("Exceeds the limit (4300 digits)")
    ("[scoring]\nx = " + "[" * 3000 + "]" * 3000 + "\n", "d.toml", "nested too deeply"),
    ("[stopping]\nmax_items = " + "9" * 5001 + "\n", "d.toml", "thousands of digits"),
    ("[stopping]\nmax_items = " + "9" * 30 + "\n", "[stopping] max_items", "30 digits is too large"),
    ("[blueprint]\npretest_positions = [3, -" + "9" * 400 + "]\n", "[blueprint] pretest_positions",
     "400 digits"),
], ids=["deep-array", "5001-digits", "30-digits", "400-digits-in-array"])
def test_hostile_toml_values_are_refused_with_a_location(text, location, fragment):
    found = problems_of(text, source="d.toml")
    assert location in found and fragment in found[location], found


def test_special_and_oversized_design_files_are_refused(tmp_path, monkeypatch):
    import os

    import adaptive_engine.design.toml_file as design_file

    fifo = tmp_path / "pipe.toml"
    os.mkfifo(fifo)
    for path, fragment in [(fifo, "not a regular file"), ("/dev/zero", "not a regular file"),
                           (tmp_path, "folder"), (str(tmp_path / "d\x00.toml"), "NUL byte")]:
        with pytest.raises(DesignError, match=fragment) as info:
            read_design(path)
        assert info.value.location
    path = tmp_path / "big.toml"
    path.write_text("# " + "x" * 300 + "\n[stopping]\nmax_items = 5\n")
    monkeypatch.setattr(design_file, "MAX_DESIGN_FILE_BYTES", 200)
    with pytest.raises(DesignError, match="more than the 200 bytes"):
        read_design(path)


@pytest.mark.parametrize("target, fragment", [("/dev/zero", "not a regular file"), ("pipe", "not a regular file"),
                                              ("a\x00b.csv", "NUL byte"), (".", "folder")])
def test_exposure_parameters_must_name_a_regular_file(tmp_path, target, fragment):
    # parameters = "/dev/zero" grew design check to 21 GB, and a FIFO path hung
    import os

    os.mkfifo(tmp_path / "pipe")
    text = '[exposure]\nmethod = "sympson_hetter"\nparameters_file = "' + target.replace("\x00", "\\u0000") + '"\n'
    with pytest.raises(DesignError, match=fragment) as info:
        parse_design(text, base_dir=tmp_path)
    assert info.value.location == "[exposure] parameters_file"


def test_conditional_exposure_strata_are_bounded():
    cuts = list(range(-15, 15))
    lines = ["item_id,theta_from,theta_to,exposure_parameter"]
    for lo, hi in zip(["-inf"] + cuts, cuts + ["inf"]):
        lines.append(f"A,{lo},{hi},0.5")
    with pytest.raises(DesignError, match="31 ability strata; at most 20"):
        parse_exposure_file("\n".join(lines) + "\n", source="sh.csv")


# ----------------------------------------------------------------------------------------
# writing back

_finite = dict(allow_nan=False, allow_infinity=False)
_names = st.text(alphabet=st.characters(min_codepoint=32, max_codepoint=0x2FF), min_size=1, max_size=12).filter(
    lambda s: s.strip() != "")


@st.composite
def designs(draw):
    """Valid designs with keys drawn over their whole ranges (validate_design must pass)."""
    grid_min = draw(st.floats(-8, -2, **_finite))
    grid_max = draw(st.floats(2, 8, **_finite))
    on_grid = st.floats(-1.5, 1.5, **_finite)
    max_items = draw(st.integers(1, 60))
    opening = Opening(
        theta=draw(on_grid),
        random_theta=draw(st.none() | st.tuples(st.floats(-1.5, -0.01, **_finite), st.floats(0.0, 1.5, **_finite))),
        first_item_candidates=draw(st.integers(1, 10)))
    if opening.random_theta is not None:
        opening = attrs.evolve(opening, theta=0.0)
    n_areas = draw(st.integers(0, 3))
    areas = []
    for k in range(n_areas):
        if draw(st.booleans()):
            areas.append(AreaRule(name=draw(_names) + str(k), share=draw(st.floats(0.01, 0.3, **_finite))))
        else:
            low = draw(st.integers(0, max_items // 3))
            areas.append(AreaRule(name=draw(_names) + str(k), min=low,
                                  max=draw(st.none() | st.integers(low, low + 10))))
    positions = draw(st.lists(st.integers(1, max_items), unique=True, max_size=3))
    cuts = tuple(CutScore(name=f"{draw(_names)}{i}", theta=draw(on_grid), above=draw(_names), below=draw(_names))
                 for i in range(draw(st.integers(0, 2))))
    return Design(
        opening=opening,
        scoring=Scoring(method=draw(st.sampled_from(("mle", "map", "eap", "wle"))),
                        prior_mean=draw(on_grid), prior_sd=draw(st.floats(0.1, 3, **_finite)),
                        extreme_pattern_method=draw(st.sampled_from(("eap", "map", "fixed_step"))),
                        fixed_step=draw(st.floats(0.05, 2, **_finite)), grid_min=grid_min, grid_max=grid_max,
                        grid_points=draw(st.integers(21, 1001))),
        selection=Selection(criterion=draw(st.sampled_from(
            ("max_fisher_information", "posterior_weighted_information", "kullback_leibler", "a_stratified",
             "random"))),
            kl_interval=draw(st.floats(0.1, 5, **_finite)), strata=draw(st.integers(1, 8)),
            b_blocking=draw(st.booleans())),
        exposure=Exposure(method=draw(st.sampled_from(("none", "randomesque", "progressive"))),
                          candidates=draw(st.integers(1, 10)),
                          parameters_file=draw(st.none() | _names),
                          acceleration=draw(st.floats(0.1, 4, **_finite))),
        blueprint=Blueprint(areas=tuple(areas),
                            method=draw(st.sampled_from(("most_behind_area", "max_priority_index"))),
                            enemies=draw(st.booleans()), item_sets=draw(st.booleans()),
                            pretest_positions=tuple(sorted(positions)), shadow_test=draw(st.booleans())),
        stopping=Stopping(
            min_items=draw(st.integers(1, max_items)), max_items=max_items,
            se=draw(st.none() | st.floats(0.05, 1, **_finite)),
            sprt=draw(st.none() | st.builds(SprtRule, cut=on_grid, indifference=st.floats(0.05, 0.4, **_finite),
                                            alpha=st.floats(0.001, 0.49, **_finite),
                                            beta=st.floats(0.001, 0.49, **_finite))),
            confidence_interval=draw(st.none() | st.builds(ConfidenceRule, cut=on_grid,
                                                           confidence=st.floats(0.5, 0.999, **_finite))),
            se_reduction=draw(st.none() | st.floats(1e-4, 0.1, **_finite)),
            min_information=draw(st.none() | st.floats(1e-3, 1, **_finite)),
            time_limit=draw(st.none() | st.floats(1, 1e5, **_finite))),
        reporting=Reporting(
            final_method=draw(st.none() | st.sampled_from(("mle", "map", "eap", "wle"))),
            confidence=draw(st.floats(0.5, 0.999, **_finite)),
            scale=ScaleRule(slope=draw(st.floats(0.5, 200, **_finite)), intercept=draw(st.floats(-1e3, 1e3, **_finite)),
                            decimals=draw(st.integers(0, 4)), min=draw(st.none() | st.just(-1e6)),
                            max=draw(st.none() | st.just(1e6))),
            cut_scores=cuts, person_fit_threshold=draw(st.floats(-4, 0, **_finite))),
        source=draw(st.sampled_from(("design", "a.toml"))),
    )


@settings(max_examples=50, deadline=None)
@given(designs())
def test_round_trip_through_toml(design):
    # Oracle: tomllib (TOML v1.0.0) must read what we write, and give the design back.
    assume(not validate_design(design))
    text = design_to_toml(design)
    tomllib.loads(text)
    assert parse_design(text, source=design.source) == design


@settings(max_examples=50, deadline=None)
@given(designs())
def test_round_trip_through_plain_dict(design):
    assume(not validate_design(design))
    data = json.loads(json.dumps(design_as_dict(design)))
    assert design_from_dict(data) == design


def test_written_toml_equals_plain_dict_without_nones():
    # Oracle: tomllib's reading of our TOML text equals the plain dict (less None values).
    design = read_design(SIMULATIONS / "licensing_exam.toml")
    data = design_as_dict(design)
    del data["source"], data["exposure_parameters"]
    # written only when true (designs without it keep their fingerprints; docs/designs.md)
    assert data["reporting"].pop("announce_pretest_items") is False

    def drop_none(x):
        if isinstance(x, dict):
            return {k: drop_none(v) for k, v in x.items() if v is not None}
        if isinstance(x, list):
            return [drop_none(v) for v in x]
        return x

    assert tomllib.loads(design_to_toml(design)) == drop_none(data)


def test_stored_design_keeps_its_exposure_parameters_without_the_file():
    design = read_design(SIMULATIONS / "sympson_hetter.toml")
    data = json.loads(json.dumps(design_as_dict(design)))
    rebuilt = design_from_dict(data, base_dir="/nonexistent-folder")
    assert rebuilt == design
    assert rebuilt.exposure_parameters == design.exposure_parameters
    data["exposure_parameters"] = {"X": 1.5}
    with pytest.raises(DesignError, match=r"\[0, 1\]"):
        design_from_dict(data)


# ----------------------------------------------------------------------------------------
# robustness: random edits of a valid design never escape as another exception

_VALUES = st.sampled_from([
    "1", "-3", "0", "0.0", "-0.5", "1e400", "inf", "nan", "99999999999999999999", "true", "false",
    '"eap"', '"sympson_hetter"', '"a_stratified"', '""', "[]", "[1, 2]", "[2.0, 1.0]", "[0.5]",
    '[1, "a"]', "{x = 1}", "{}", "1979-05-27", "[[1]]", '"exposure.csv"',
])


@st.composite
def mutated_designs(draw):
    lines = (SIMULATIONS / "licensing_exam.toml").read_text().splitlines()
    for _ in range(draw(st.integers(1, 4))):
        i = draw(st.integers(0, len(lines) - 1))
        kind = draw(st.sampled_from(("value", "delete", "duplicate", "char", "rename")))
        line = lines[i]
        if kind == "value" and "=" in line:
            lines[i] = line.split("=", 1)[0] + "= " + draw(_VALUES)
        elif kind == "delete":
            del lines[i]
        elif kind == "duplicate":
            lines.insert(i, line)
        elif kind == "rename" and line.strip():
            lines[i] = line.replace(line.split()[0], line.split()[0] + draw(st.sampled_from(("x", "_2", "s"))), 1)
        else:
            pos = draw(st.integers(0, len(line)))
            lines[i] = line[:pos] + draw(st.sampled_from(list("[]=\"'#.,{}x1 \t\\"))) + line[pos:]
        if not lines:
            lines = [""]
    return "\n".join(lines) + "\n"


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(mutated_designs())
def test_mutated_designs_give_a_design_or_a_located_design_error(text):
    try:
        design = parse_design(text, source="mutant.toml", base_dir=SIMULATIONS)
    except DesignError as exc:
        assert exc.problems and all(p.location and p.message for p in exc.problems)
    else:
        assert isinstance(design, Design)
        assert not validate_design(design)


# ----------------------------------------------------------------------------------------
# fit to a bank


def _bank(records):
    return bank_from_records([{"model": "2PL", "a": 1.0, "b": 0.0, "status": "operational", **r} for r in records])


def test_usable_count_under_enemy_groups_matches_a_set_packing_solver():
    # Oracle: scipy.optimize.milp solving max sum x_i s.t. for each enemy group
    # sum_{i in group} x_i <= 1 (and every item of a set larger than max_items excluded).
    from scipy.optimize import Bounds, LinearConstraint, milp

    rng = np.random.default_rng(7)
    for trial in range(25):
        n = int(rng.integers(3, 25))
        n_groups = int(rng.integers(1, 6))
        multi = trial % 2 == 1  # odd trials: items may sit in two groups
        records = []
        for i in range(n):
            k = int(rng.choice([0, 1, 2] if multi else [0, 1], p=[0.4, 0.4, 0.2] if multi else [0.5, 0.5]))
            groups = sorted({f"g{g}" for g in rng.integers(0, n_groups, size=k)})
            records.append({"item_id": f"I{i}", "enemy_group": ";".join(groups)})
        bank = _bank(records)
        mask = np.ones(n, bool)
        group_names = sorted({g for gs in bank.enemy_groups for g in gs})
        if group_names:
            A = np.array([[g in bank.enemy_groups[i] for i in range(n)] for g in group_names], float)
            res = milp(-np.ones(n), constraints=LinearConstraint(A, -np.inf, 1),
                       integrality=np.ones(n), bounds=Bounds(0, 1))
            best = int(round(-res.fun))
        else:
            best = n
        got = usable_item_count(bank, mask, enemies=True, item_sets=False, max_items=100)
        if multi:
            assert got <= best  # greedy: reachable, never above the optimum
        else:
            assert got == best
        assert usable_item_count(bank, mask, enemies=False, item_sets=False, max_items=100) == n


def test_bank_misfits_are_each_reported_at_their_key():
    records = (
        [{"item_id": f"S{i}", "area": "source_water", "enemy_group": "e1" if i < 4 else ""} for i in range(6)]
        + [{"item_id": f"T{i}", "area": "treatment_processes", "item_set": "big"} for i in range(5)]
        + [{"item_id": "P1", "area": "source_water", "status": "pretest"}]
    )
    bank = _bank(records)
    text = """
[selection]
criterion = "a_stratified"
strata = 3
[exposure]
method = "randomesque"
candidates = 20
[blueprint]
pretest_positions = [2, 3]
enemies = true
item_sets = true
[blueprint.areas.source_water]
min = 4
[blueprint.areas.treatment_processes]
share = 0.5
[blueprint.areas.no_such_area]
min = 0
[stopping]
min_items = 2
max_items = 4
"""
    design = parse_design(text)
    found = {p.location: p.message for p in check_design_against_bank(design, bank)}
    # source_water: 4 items in one enemy group count once, plus 2 free items = 3 < 4
    assert "only 3 usable" in found["[blueprint.areas.source_water] min"]
    # the 5-item set exceeds the 4-item test, so treatment has no usable item
    assert "needs 2 items" in found["[blueprint.areas.treatment_processes] share"]
    assert "never be given whole" in found["[blueprint] item_sets"]
    assert "not in the bank" in found["[blueprint.areas.no_such_area]"]
    assert "at most 3 operational items" in found["[stopping] max_items"]
    assert "1 pretest item" in found["[blueprint] pretest_positions"]
    assert "20 candidates" in found["[exposure] candidates"]
    assert "same discrimination" in found["[selection] strata"]
    with pytest.raises(DesignError):
        require_design_fits_bank(design, bank)


def test_sympson_hetter_ids_and_strata_checked_against_the_bank(tmp_path):
    bank = _bank([{"item_id": f"I{i}", "a": 0.5 + 0.1 * i} for i in range(6)])
    (tmp_path / "sh.csv").write_text("item_id,exposure_parameter\nI0,0.5\nZ9,0.3\n")
    design = parse_design('[selection]\ncriterion = "a_stratified"\nstrata = 7\n'
                          '[exposure]\nmethod = "sympson_hetter"\nparameters_file = "sh.csv"\n'
                          '[stopping]\nmax_items = 6\n', base_dir=tmp_path)
    found = {p.location: p.message for p in check_design_against_bank(design, bank)}
    assert set(found) == {"[exposure] parameters_file", "[selection] strata"}
    assert "Z9" in found["[exposure] parameters_file"] and "I0" not in found["[exposure] parameters_file"]
    assert "7 strata" in found["[selection] strata"]


def test_a_fitting_design_has_no_problems():
    bank = _bank([{"item_id": f"I{i}", "a": 0.5 + 0.1 * i, "area": "x" if i % 2 else "y"} for i in range(10)])
    design = parse_design("[blueprint.areas.x]\nmin = 2\nmax = 5\n[blueprint.areas.y]\nshare = 0.5\n"
                          "[stopping]\nmax_items = 8\n")
    assert check_design_against_bank(design, bank) == []


def test_designs_built_in_code_check_themselves_like_files():
    # A design made in code (or changed with attrs.evolve) never passes the reader: each
    # section checks every key when it is made, lists every problem and locates each one
    # as the design file spells the key.
    with pytest.raises(DesignError) as info:
        Scoring(grid_min=-1e300, grid_max=1e300, grid_points=20001)
    found = {p.location: p.message for p in info.value.problems}
    assert set(found) == {"[scoring] grid_min", "[scoring] grid_max", "[scoring] grid_points"}
    assert "must lie in [-20, 20]" in found["[scoring] grid_min"]
    with pytest.raises(DesignError) as info:
        attrs.evolve(ScaleRule(), slope=1e308, intercept=1e308)
    assert {p.location for p in info.value.problems} == {"[reporting.scale] slope", "[reporting.scale] intercept"}
    # types, options and the rules between keys, as in a file
    for make, location, fragment in [
        (lambda: Stopping(max_items=2.5), "[stopping] max_items", "whole number"),
        (lambda: Stopping(se=True), "[stopping] se", "got true/false"),
        (lambda: Selection(b_blocking="yes"), "[selection] b_blocking", "true or false"),
        (lambda: Scoring(method="bayes"), "[scoring] method", "allowed values: mle, map, eap, wle"),
        (lambda: Scoring(grid_min=2.0, grid_max=-2.0), "[scoring] grid_max", "above grid_min"),
        (lambda: AreaRule(name="x", min=5, max=2), "[blueprint.areas.x] max", "below min"),
        (lambda: Blueprint(pretest_positions=(0,)), "[blueprint] pretest_positions", "1-based"),
        (lambda: Design(stopping=Stopping(max_items=5), blueprint=Blueprint(areas=(AreaRule(name="x", min=6),))),
         "[blueprint.areas.x] min", "exceeds the test length"),
        (lambda: Design(reporting=Reporting(cut_scores=(CutScore(name="c", theta=9.0),))),
         "[[reporting.cut_scores]] #1 theta", "outside the ability grid"),
        (lambda: Design(exposure=Exposure(method="sympson_hetter")), "[exposure] parameters_file",
         "needs a parameters CSV"),
    ]:
        with pytest.raises(DesignError) as info:
            make()
        found = {p.location: p.message for p in info.value.problems}
        assert location in found and fragment in found[location], found


def test_options_are_enums_that_read_and_write_as_text():
    design = Design(scoring=Scoring(method="wle", extreme_pattern_method="fixed_step"),
                    exposure=Exposure(method="progressive"))
    assert design.scoring.method is ScoringMethod.WLE and design.scoring.method == "wle"
    assert design.scoring.extreme_pattern_method is ExtremePatternMethod.FIXED_STEP
    assert design.exposure.method is ExposureMethod.PROGRESSIVE
    assert design.final_method is ScoringMethod.WLE
    # Oracles: tomllib and json read the written forms back as plain text
    assert tomllib.loads(design_to_toml(design))["scoring"]["method"] == "wle"
    data = json.loads(json.dumps(design_as_dict(design)))
    assert data["exposure"]["method"] == "progressive" and type(design_as_dict(design)["scoring"]["method"]) is str
    assert design_from_dict(data) == design


def test_a_design_forced_past_its_constructor_is_stopped_at_the_gate():
    # object.__setattr__ gets round a frozen class's checks; the gate every run passes
    # (check_design_against_bank) checks the design again from scratch
    bank = _bank([{"item_id": f"I{i}", "b": 0.1 * i} for i in range(40)])
    stopping = Stopping(min_items=3, max_items=12)
    object.__setattr__(stopping, "min_items", 20)
    design = Design(stopping=Stopping(max_items=12))
    object.__setattr__(design, "stopping", stopping)
    found = {p.location: p.message for p in check_design_against_bank(design, bank)}
    assert "exceeds max_items" in found["[stopping] min_items"]
    assert validate_design(design) and not validate_design(Design())


def test_blueprints_that_cannot_be_met_are_refused_with_the_reason():
    records = ([{"item_id": f"S{i}", "area": "source_water"} for i in range(12)]
               + [{"item_id": f"T{i}", "area": "treatment_processes", "item_set": "long_case" if i < 5 else ""}
                  for i in range(8)])
    bank = _bank(records)
    # minimums adding up to more than the test length: refused on reading already
    found = problems_of("[blueprint.areas.source_water]\nmin = 8\n[blueprint.areas.treatment_processes]\n"
                        "min = 6\n[stopping]\nmin_items = 10\nmax_items = 12\n")
    assert "minimums add up to 14, more than max_items (12)" in found["[blueprint.areas]"]
    # a set larger than its area's maximum can never be given: its items do not count
    found = {p.location: p.message for p in check_design_against_bank(parse_design(
        "[blueprint]\nitem_sets = true\n[blueprint.areas.treatment_processes]\nmin = 4\nmax = 4\n"
        "[stopping]\nmin_items = 5\nmax_items = 10\n"), bank)}
    assert "'long_case' has 5 items of area 'treatment_processes', more than its max (4)" in found[
        "[blueprint] item_sets"]
    assert "only 3 usable" in found["[blueprint.areas.treatment_processes] min"]
    # area maximums that keep every test below min_items
    found = {p.location: p.message for p in check_design_against_bank(parse_design(
        "[blueprint.areas.source_water]\nmax = 3\n[blueprint.areas.treatment_processes]\nmax = 4\n"
        "[stopping]\nmin_items = 10\nmax_items = 12\n"), bank)}
    assert "at most 7 scored items, fewer than min_items (10)" in found["[stopping] min_items"]
    from adaptive_engine.simulation import engine as simulation

    with pytest.raises(DesignError, match="min_items"):
        simulation.simulate(parse_design("[blueprint.areas.source_water]\nmax = 3\n"
                                         "[blueprint.areas.treatment_processes]\nmax = 4\n"
                                         "[stopping]\nmin_items = 10\nmax_items = 12\n"), bank,
                            true_theta=np.zeros(2), seed=1)


# ----------------------------------------------------------------------------------------
# the shipped examples

EXAMPLES = sorted(p.name for p in SIMULATIONS.glob("*.toml"))


def _bank_for(name: str) -> Path:
    if "two_dimensional" in name:
        return BANKS / "meridian_valley_operator_2d.json"
    return BANKS / ("staff_climate_survey.csv" if name.startswith("staff") else "meridian_valley_operator.csv")


def test_all_promised_examples_are_there():
    promised = {"minimal", "licensing_exam", "licensing_sprt", "licensing_ci_classification",
                "posterior_weighted", "kullback_leibler", "a_stratified", "sympson_hetter", "progressive",
                "max_priority_index", "shadow_test", "staff_climate_survey", "licensing_two_dimensional"}
    assert promised <= {Path(n).stem for n in EXAMPLES}


@pytest.mark.parametrize("name", EXAMPLES)
def test_example_parses_round_trips_and_fits_its_bank(name):
    path = SIMULATIONS / name
    assert path.read_text().startswith("#"), "each example opens with a comment header"
    design = read_design(path)
    assert parse_design(design_to_toml(design), source=name, base_dir=SIMULATIONS) == design
    assert len(describe_design(design)) == 7
    bank_path = _bank_for(name)
    if not bank_path.exists():
        pytest.skip(f"demo bank {bank_path.name} not generated (run item_banks/make_demo_banks.py)")
    assert check_design_against_bank(design, load_bank(bank_path)) == []


def test_shipped_demo_design_is_what_the_brief_describes():
    d = read_design(SIMULATIONS / "licensing_exam.toml")
    assert (d.scoring.method, d.final_method) == ("eap", "wle")
    assert d.selection.criterion == "max_fisher_information"
    assert (d.exposure.method, d.exposure.candidates) == ("randomesque", 5)
    assert d.blueprint.method == "most_behind_area" and d.blueprint.enemies and d.blueprint.item_sets
    assert {a.name for a in d.blueprint.areas} == {"source_water", "treatment_processes", "distribution_systems",
                                                   "lab_and_monitoring", "safety_and_regulations"}
    assert all(a.max is not None for a in d.blueprint.areas)
    assert len(d.blueprint.pretest_positions) == 2
    assert (d.stopping.se, d.stopping.max_items, d.stopping.min_items) == (0.3, 40, 15)
    assert d.stopping.sprt.cut == -0.2
    # the exam's own reported scale (simulations/README.md): 260 + 50 x theta in whole
    # points, clipped to 100-400, with the licence cut at exactly 250
    s = d.reporting.scale
    assert (s.slope, s.intercept, s.decimals, s.min, s.max) == (50.0, 260.0, 0, 100.0, 400.0)
    assert [c.name for c in d.reporting.cut_scores] == ["licence"]
    assert scaled_score(s, d.reporting.cut_scores[0].theta) == 250
    assert scaled_score(s, d.stopping.sprt.cut) == 250


def test_shipped_survey_design_has_its_own_limits_and_scale():
    # simulations/README.md: at least 2 statements per area (so 8), at most 14, SE 0.4;
    # climate points 20 x theta, whole points, clipped to -60..60
    d = read_design(SIMULATIONS / "staff_climate_survey.toml")
    assert (d.stopping.min_items, d.stopping.max_items, d.stopping.se) == (8, 14, 0.4)
    assert {(a.name, a.min, a.max) for a in d.blueprint.areas} == {
        (area, 2, 5) for area in ("workload", "team_support", "leadership", "wellbeing")}
    assert sum(a.min for a in d.blueprint.areas) == d.stopping.min_items
    s = d.reporting.scale
    assert (s.slope, s.intercept, s.decimals, s.min, s.max) == (20.0, 0.0, 0, -60.0, 60.0)


def test_demo_sympson_hetter_parameters_cover_the_operational_items():
    bank_path = _bank_for("sympson_hetter.toml")
    if not bank_path.exists():
        pytest.skip("demo bank not generated")
    bank = load_bank(bank_path)
    design = read_design(SIMULATIONS / "sympson_hetter.toml")
    operational = {str(i) for i, s in zip(bank.item_ids, bank.status) if s == "operational"}
    assert set(design.exposure_parameters) == operational
    assert all(0 < v <= 1 and math.isfinite(v) for v in design.exposure_parameters.values())
