"""Designs that cannot be invalid, library errors in the library's terms, renamed keys.

Through the public API (``adaptive_engine.simulate``, ``adaptive_engine.start_session``):

* a design option changed to an unknown value with ``attrs.evolve`` is refused with a
  ``DesignError`` naming the key;
* a design whose stopping has ``min_items=10, max_items=3``, made in code, is refused by
  simulation and live start alike, naming the key -- also when it was forced past its
  constructor, because the gate every run passes checks it again;
* ``simulate(..., chunk_size=0)`` names ``chunk_size``; the command line names
  ``--chunk-size``;
* the old spellings of renamed design keys are read with a deprecation warning (printed
  by the command line), written back with the new names, and load silently from a store.

Oracles: the TOML v1.0.0 specification through the standard library's ``tomllib`` (what
the writer emits); everything else here is the project's own contract, checked on
invented test input.
"""

from __future__ import annotations

import tomllib
import warnings
from pathlib import Path

import attrs
import numpy as np
import pytest
from click.testing import CliRunner

import adaptive_engine
from adaptive_engine.bank import bank_from_records
from adaptive_engine.cli import main
from adaptive_engine.design import Blueprint, BlueprintMethod, Design, Exposure, Stopping
from adaptive_engine.design.toml_file import design_from_dict, design_to_toml, parse_design, read_design
from adaptive_engine.errors import DeprecatedDesignKey, DesignError
from adaptive_engine.live.store import design_from_content

REPO = Path(__file__).resolve().parents[1]
SIMULATIONS = REPO / "simulations"
OPERATOR_BANK = REPO / "item_banks" / "meridian_valley_operator.csv"


def _bank(n=40):
    return bank_from_records([{"item_id": f"I{i:02d}", "model": "2PL", "a": 1.0 + 0.02 * i, "b": -2 + 0.1 * i,
                               "status": "operational"} for i in range(n)])


def _locations(info) -> dict:
    return {p.location: p.message for p in info.value.problems}


def _forced(obj, **fields):
    """``obj`` with ``fields`` set behind its constructor's back (a frozen class's loophole)."""
    for name, value in fields.items():
        object.__setattr__(obj, name, value)
    return obj


# ----------------------------------------------------------------------------------------
# done when: an unknown option value, min_items above max_items


def test_an_unknown_option_set_with_evolve_is_refused_naming_the_key():
    design = read_design(SIMULATIONS / "licensing_exam.toml")
    with pytest.raises(DesignError) as info:
        attrs.evolve(design.exposure, method="randomesq")
    found = _locations(info)
    assert list(found) == ["[exposure] method"]
    assert "unknown value 'randomesq'" in found["[exposure] method"]
    assert "allowed values: none, randomesque, sympson_hetter, progressive" in found["[exposure] method"]


def test_min_items_above_max_items_is_refused_by_simulate_and_start_session():
    bank = _bank()
    with pytest.raises(DesignError) as info:
        adaptive_engine.simulate(Design(stopping=Stopping(min_items=10, max_items=3)), bank,
                                 true_theta=np.zeros(5), seed=1)
    assert "exceeds max_items" in _locations(info)["[stopping] min_items"]
    store = adaptive_engine.open_store(":memory:")
    with store, pytest.raises(DesignError) as info:
        adaptive_engine.start_session(store, Design(stopping=Stopping(min_items=10, max_items=3)), bank, seed=1)
    assert "exceeds max_items" in _locations(info)["[stopping] min_items"]


def test_designs_forced_past_their_constructors_are_refused_by_every_entry_point():
    # the gate checks a design again from scratch: nothing invalid reaches the kernel, and
    # an unknown exposure method is never run as "no exposure control"
    bank = _bank()
    length = Design(stopping=Stopping(max_items=12))
    _forced(length, stopping=_forced(Stopping(min_items=3, max_items=12), min_items=10, max_items=3))
    method = Design(exposure=_forced(Exposure(), method="randomesq"))
    for design, location in ((length, "[stopping] min_items"), (method, "[exposure] method")):
        with pytest.raises(DesignError) as info:
            adaptive_engine.simulate(design, bank, true_theta=np.zeros(5), seed=1)
        assert location in _locations(info)
        with adaptive_engine.open_store(":memory:") as store:
            with pytest.raises(DesignError) as info:
                adaptive_engine.start_session(store, design, bank, seed=1)
            assert not store.sessions()
        assert location in _locations(info)


# ----------------------------------------------------------------------------------------
# done when: library errors name parameters, the command line names flags


def test_chunk_size_is_named_as_the_library_and_the_command_line_spell_it(tmp_path):
    with pytest.raises(adaptive_engine.SimulationError) as info:
        adaptive_engine.simulate(Design(), _bank(), true_theta=np.zeros(5), seed=1, chunk_size=0)
    assert info.value.location == "chunk_size" and "--" not in str(info.value)
    result = CliRunner().invoke(main, ["simulate", str(SIMULATIONS / "minimal.toml"), "--bank", str(OPERATOR_BANK),
                                       "--examinees", "5", "--chunk-size", "0", "--out", str(tmp_path / "run")])
    assert result.exit_code == 2
    assert "--chunk-size: chunk size must be a whole number >= 1, got 0" in result.stderr
    assert "chunk_size" not in result.stderr and not (tmp_path / "run").exists()


def test_library_locations_carry_no_flags():
    # a sample from every layer that used to name a flag
    from adaptive_engine.bank.summary import curve_grid
    from adaptive_engine.calibration.priors import parse_prior
    from adaptive_engine.simulation import Population, parse_ability_spec
    from adaptive_engine.simulation.exposure_tuning import parse_strata
    from adaptive_engine.simulation.tuning import parse_variation

    for call, location in [
        (lambda: curve_grid(1.0, 0.0, 0.5), "stop"),
        (lambda: parse_prior("q=normal:0,1"), "prior q=normal:0,1"),
        (lambda: parse_ability_spec("normal:x,1"), "abilities"),
        (lambda: Population.drawn(parse_ability_spec("grid:-1,1,3:2"), seed=1, n_examinees=7), "n_examinees"),
        (lambda: Population(true_theta=[np.nan], seed=1), "true_theta"),
        (lambda: parse_strata("1,x"), "strata"),
        (lambda: parse_variation("stopping.se"), "variations"),
    ]:
        with pytest.raises(adaptive_engine.AdaptiveEngineError) as info:
            call()
        assert info.value.location == location
        assert not any(p.location.startswith("--") for p in info.value.problems)


# ----------------------------------------------------------------------------------------
# renamed keys


OLD_SPELLINGS = """\
[opening]
first_items_from_top = 4
[scoring]
method = "mle"
until_mixed = "fixed_step"
[blueprint]
method = "constrained"
[blueprint.areas.a]
min = 1
"""
NEW_SPELLINGS = """\
[opening]
first_item_candidates = 4
[scoring]
method = "mle"
extreme_pattern_method = "fixed_step"
[blueprint]
method = "most_behind_area"
[blueprint.areas.a]
min = 1
"""


def test_old_spellings_are_read_with_a_deprecation_warning_naming_each_key():
    with pytest.warns(DeprecatedDesignKey) as caught:
        old = parse_design(OLD_SPELLINGS)
    messages = [str(w.message) for w in caught]
    assert len(messages) == 3
    assert any(m.startswith("[opening] first_items_from_top: renamed to first_item_candidates") for m in messages)
    assert any(m.startswith("[scoring] until_mixed: renamed to extreme_pattern_method") for m in messages)
    assert any(m.startswith('[blueprint] method: "constrained" is now spelled "most_behind_area"') for m in messages)
    assert all(issubclass(w.category, DeprecationWarning) for w in caught)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        new = parse_design(NEW_SPELLINGS)
    assert old == new and new.blueprint.method is BlueprintMethod.MOST_BEHIND_AREA
    # written back with the new names only (oracle: tomllib reads the text)
    written = tomllib.loads(design_to_toml(old))
    assert written["opening"]["first_item_candidates"] == 4 and "first_items_from_top" not in written["opening"]
    assert written["scoring"]["extreme_pattern_method"] == "fixed_step" and "until_mixed" not in written["scoring"]
    assert written["blueprint"]["method"] == "most_behind_area"
    # the old option value in code, too
    with pytest.warns(DeprecatedDesignKey, match="constrained"):
        assert Blueprint(method="constrained").method is BlueprintMethod.MOST_BEHIND_AREA


def test_problems_under_an_old_spelling_are_located_as_the_file_spells_them(tmp_path):
    with pytest.warns(DeprecatedDesignKey), pytest.raises(DesignError) as info:
        parse_design('[scoring]\nuntil_mixed = "wle"\n[exposure]\nmethod = "sympson_hetter"\nparameters = "x.csv"\n',
                     base_dir=tmp_path)
    found = _locations(info)
    assert "allowed values: eap, map, fixed_step" in found["[scoring] until_mixed"]
    with pytest.raises(DesignError) as info:
        parse_design("[opening]\nfirst_items_from_top = 2\nfirst_item_candidates = 3\n")
    assert "keep first_item_candidates" in _locations(info)["[opening] first_items_from_top"]


def test_the_old_exposure_parameters_key_still_names_the_file(tmp_path):
    (tmp_path / "sh.csv").write_text("item_id,exposure_parameter\nI01,0.5\n")
    with pytest.warns(DeprecatedDesignKey, match=r"\[exposure\] parameters: renamed to parameters_file"):
        design = parse_design('[exposure]\nmethod = "sympson_hetter"\nparameters = "sh.csv"\n', base_dir=tmp_path)
    assert design.exposure.parameters_file == "sh.csv" and design.exposure_parameters == {"I01": 0.5}


def test_a_design_stored_under_the_old_names_loads_without_a_warning():
    with pytest.warns(DeprecatedDesignKey):
        expected = parse_design(OLD_SPELLINGS, source="x")
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        stored = design_from_content(OLD_SPELLINGS, None, design_id="abc")
    assert attrs.evolve(stored, source="x") == expected
    with pytest.warns(DeprecatedDesignKey):
        assert design_from_dict(tomllib.loads(OLD_SPELLINGS)) == attrs.evolve(expected, source="")


def test_the_command_line_prints_a_warning_per_old_spelling(tmp_path):
    path = tmp_path / "old.toml"
    path.write_text(OLD_SPELLINGS)
    result = CliRunner().invoke(main, ["design", "show", str(path)])
    assert result.exit_code == 0, result.output
    warned = [line for line in result.stderr.splitlines() if line.startswith("warning: ")]
    assert len(warned) == 3 and "warning: [scoring] until_mixed: renamed to extreme_pattern_method" in warned[1]
    assert tomllib.loads(result.stdout)["scoring"]["extreme_pattern_method"] == "fixed_step"


def test_tune_reads_an_old_key_with_a_warning():
    from adaptive_engine.simulation.tuning import apply_settings, parse_variation

    with pytest.warns(DeprecatedDesignKey, match="until_mixed"):
        variation = parse_variation("scoring.until_mixed=map,eap")
    assert variation.key == "scoring.extreme_pattern_method"
    design = apply_settings(Design(), {variation.key: "map"})
    assert design.scoring.extreme_pattern_method == "map"


def test_shipped_designs_use_the_new_spellings():
    for path in SIMULATIONS.glob("*.toml"):
        with warnings.catch_warnings():
            warnings.simplefilter("error", DeprecatedDesignKey)
            read_design(path)
