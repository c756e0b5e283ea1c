"""Sympson-Hetter exposure control conditional on ability (Stocking & Lewis 1998), end to end.

Outside references used here:

* Stocking & Lewis (1998), *Journal of Educational and Behavioral Statistics* 23, 57-75:
  the conditional method keeps one exposure parameter per item and ability level, and
  after calibration the exposure rate *conditional on ability*, P(given_i | theta), stays
  at or below the target r for every ability level (up to simulation noise); the lottery
  of a test uses the parameters of the examinee's (estimated) ability level.
* Sympson & Hetter (1985), Proc. 27th Military Testing Association: the step
  k_i = min(1, r / P(selected_i)) that the conditional step reduces to when the
  estimate's stratum is the true one.
* The brief's file layout (``item_id,theta_from,theta_to,exposure_parameter``) and the
  standard library's ``csv``/``json`` as oracles for what our writer emits.

The banks below are test inputs (random parameters in plausible ranges), never references.
"""

from __future__ import annotations

import csv
import io
import json
import math
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner
from hypothesis import given, settings
from hypothesis import strategies as st

from adaptive_engine.bank import bank_from_records, load_bank
from adaptive_engine.bank.files import write_bank_csv
from adaptive_engine.cli import main
from adaptive_engine.design import Design, Exposure, Stopping
from adaptive_engine.design.bank_fit import check_design_against_bank
from adaptive_engine.design.exposure_parameters import parse_exposure_file
from adaptive_engine.design.toml_file import design_as_dict, design_from_dict, read_design
from adaptive_engine.errors import AdaptiveEngineError, DesignError
from adaptive_engine.kernel.prepared import build_context
from adaptive_engine.live.store import design_content, design_from_content
from adaptive_engine.simulation import engine as simulation
from adaptive_engine.simulation.exposure_tuning import (
    _updated_conditional,
    calibrate_sympson_hetter,
    parameters_csv,
    parse_strata,
    with_parameters,
)
from adaptive_engine.simulation.population import Population
from kernel_support import run_batch, structured_bank

REPO = Path(__file__).resolve().parents[1]
DEMO_BANK = REPO / "item_banks" / "meridian_valley_operator.csv"
HEADER = "item_id,theta_from,theta_to,exposure_parameter\n"


def problems(text: str) -> dict[str, str]:
    with pytest.raises(DesignError) as info:
        parse_exposure_file(text, source="c.csv")
    return {p.location: p.message for p in info.value.problems}


def bank_2pl(n, *, seed):
    """Test input: n 2PL items, a uniform(0.6, 2.2), b standard normal."""
    rng = np.random.default_rng(seed)
    return bank_from_records([dict(item_id=f"r{i:03d}", model="2PL", a=float(rng.uniform(0.6, 2.2)),
                                   b=float(rng.normal())) for i in range(n)])


# ----------------------------------------------------------------------------------------
# the file


def test_conditional_file_is_read_by_its_header_in_any_row_order():
    text = HEADER + "A,-1,inf,0.2\nB,-inf,-1,0.3\nA,-inf,-1,0.5\n\nB,-1,inf,1\n"
    got = parse_exposure_file(text, source="c.csv")
    assert got.strata == (-1.0,)
    assert got.parameters == {"A": (0.5, 0.2), "B": (0.3, 1.0)}
    # the unconditional layout is unchanged: one float per item, no strata
    plain = parse_exposure_file("item_id,exposure_parameter\nA,0.5\n")
    assert plain.parameters == {"A": 0.5} and plain.strata == ()


@pytest.mark.parametrize("rows, line, words", [
    ("A,-2,0,0.5\nA,0,inf,0.5\n", 2, "-inf"),            # lowest stratum does not start at -inf
    ("A,-inf,0,0.5\nA,0,3,0.5\n", 3, "end at inf"),       # highest does not end at inf
    ("A,-inf,0,0.5\nA,0.5,inf,0.5\n", 3, "gap"),          # gap between 0 and 0.5
    ("A,-inf,0,0.5\nA,-0.5,inf,0.5\n", 3, "overlaps"),    # overlap
    ("A,-inf,0,0.5\nA,-inf,0,0.4\nA,0,inf,1\n", 3, "overlaps"),  # the same stratum twice
])
def test_bad_boundaries_are_named_by_line(rows, line, words):
    found = problems(HEADER + rows)
    assert list(found) == [f"c.csv line {line}"]
    assert words in found[f"c.csv line {line}"]


def test_items_with_different_strata_are_refused_at_the_later_item():
    text = HEADER + "A,-inf,0,0.5\nA,0,inf,0.5\nB,-inf,1,0.5\nB,1,inf,0.4\n"
    found = problems(text)
    assert list(found) == ["c.csv line 4"]
    assert "same strata" in found["c.csv line 4"] and "item A (line 2)" in found["c.csv line 4"]


def test_bad_values_are_named_by_line():
    text = HEADER + ("A,-inf,0,1.5\nB,-inf,0,abc\nC,nan,0,0.5\nD,1,1,0.5\nE,-inf,0\n,-inf,0,0.5\n"
                     "F,-inf,x,0.5\n")
    found = problems(text)
    assert set(found) == {f"c.csv line {i}" for i in range(2, 9)}
    assert "[0, 1]" in found["c.csv line 2"]
    assert "exposure_parameter is not a number" in found["c.csv line 3"]
    assert "theta_from is not a number" in found["c.csv line 4"]
    assert "below theta_to" in found["c.csv line 5"]
    assert "expected 4 fields" in found["c.csv line 6"]
    assert "item_id is empty" in found["c.csv line 7"]
    assert "theta_to is not a number" in found["c.csv line 8"]


def test_unknown_header_names_both_layouts():
    found = problems("item_id,from,to,k\nA,-inf,inf,1\n")
    assert "item_id,theta_from,theta_to,exposure_parameter" in found["c.csv line 1"]


@settings(max_examples=40, deadline=None)
@given(cuts=st.lists(st.floats(-4, 4, allow_nan=False).map(lambda x: round(x, 3)), min_size=1, max_size=4,
                     unique=True),
       values=st.lists(st.floats(0, 1), min_size=5, max_size=5), n_items=st.integers(1, 4))
def test_written_file_reads_back(cuts, values, n_items):
    # Oracle: the standard library's csv reader sees one row per item and stratum with the
    # boundaries -inf .. cuts .. inf; our reader returns the parameters (to 6 decimals).
    cuts = tuple(sorted(cuts))
    s = len(cuts) + 1
    params = {f"I{j}": tuple(values[(j + t) % 5] for t in range(s)) for j in range(n_items)}
    text = parameters_csv(params, cuts)
    rows = list(csv.DictReader(io.StringIO(text)))
    assert len(rows) == n_items * s
    assert [float(r["theta_from"]) for r in rows[:s]] == [-math.inf, *cuts]
    assert [float(r["theta_to"]) for r in rows[:s]] == [*cuts, math.inf]
    back = parse_exposure_file(text)
    assert back.strata == cuts
    for iid, vals in params.items():
        assert back.parameters[iid] == pytest.approx(vals, abs=5e-7)


def test_design_reads_the_conditional_file_and_checks_it_against_the_bank(tmp_path):
    (tmp_path / "c.csv").write_text(HEADER + "q000,-inf,0,0.5\nq000,0,inf,0.25\nq001,-inf,0,1\nq001,0,inf,0.1\n")
    path = tmp_path / "d.toml"
    path.write_text('[exposure]\nmethod = "sympson_hetter"\nparameters_file = "c.csv"\n'
                    "[stopping]\nmin_items = 5\nmax_items = 5\n")
    design = read_design(path)
    assert design.exposure_strata == (0.0,)
    assert design.exposure_parameters == {"q000": (0.5, 0.25), "q001": (1.0, 0.1)}
    bank = structured_bank(0, 30)
    assert check_design_against_bank(design, bank) == []
    ctx = build_context(design, bank)
    assert ctx.exposure_k.shape == (2, bank.n_items)
    assert ctx.exposure_k[:, bank.index_of["q001"]].tolist() == [1.0, 0.1]
    # parameters that do not match the strata (a design built in code) are refused, located
    with pytest.raises(DesignError) as info:
        Design(exposure=Exposure(method="sympson_hetter", parameters_file="x"), exposure_strata=(0.0,),
               exposure_parameters={"q000": (0.5,)})
    assert "exposure_parameters, item q000" in {p.location for p in info.value.problems}


# ----------------------------------------------------------------------------------------
# stored designs


CONDITIONAL = Design(exposure=Exposure(method="sympson_hetter", parameters_file="c.csv"),
                     stopping=Stopping(min_items=10, max_items=10), exposure_strata=(-0.5, 0.5),
                     exposure_parameters={"q000": (0.5, 0.25, 1.0), "q002": (1.0, 0.0, 0.75)})


def test_design_dict_round_trip_keeps_conditional_parameters_without_the_file():
    # Oracle: json.dumps/json.loads (what the session store does with the dict).
    data = json.loads(json.dumps(design_as_dict(CONDITIONAL)))
    assert data["exposure_strata"] == [-0.5, 0.5]
    back = design_from_dict(data, base_dir="/nonexistent-folder")
    assert back == CONDITIONAL
    assert back.exposure_strata == CONDITIONAL.exposure_strata
    assert back.exposure_parameters == CONDITIONAL.exposure_parameters
    data["exposure_parameters"]["q000"] = [0.5, 0.25]
    with pytest.raises(DesignError) as info:
        design_from_dict(data)
    assert info.value.location == "exposure_parameters q000" and "3 values" in str(info.value)
    data["exposure_parameters"]["q000"] = [0.5, 1.25, 1.0]
    with pytest.raises(DesignError, match=r"\[0, 1\]"):
        design_from_dict(data)
    data["exposure_strata"] = [0.5, -0.5]
    with pytest.raises(DesignError) as info:
        design_from_dict(data)
    assert info.value.location == "exposure_strata"


def test_session_store_content_keeps_conditional_parameters():
    design_id, toml_text, params = design_content(CONDITIONAL)
    back = design_from_content(toml_text, params, design_id=design_id)
    assert back.exposure_strata == CONDITIONAL.exposure_strata
    assert back.exposure_parameters == CONDITIONAL.exposure_parameters
    # other parameters or strata give another content id
    other = design_content(with_parameters(CONDITIONAL, CONDITIONAL.exposure_parameters, path="c.csv",
                                           strata=(-0.5, 0.6)))[0]
    assert other != design_id
    # unconditional designs are stored as before: item id -> number
    plain = with_parameters(CONDITIONAL, {"q000": 0.5}, path="c.csv")
    assert json.loads(design_content(plain)[2]) == {"q000": 0.5}


# ----------------------------------------------------------------------------------------
# the kernel


def _parity_parameters(bank, cut_count):
    """Even items blocked below the first cut, odd items blocked above it (test input)."""
    out = {}
    for i, iid in enumerate(bank.item_ids):
        low = 0.0 if i % 2 == 0 else 1.0
        out[iid] = (low,) + (1.0 - low,) * cut_count
    return out


def test_the_lottery_uses_the_stratum_of_the_interim_estimate():
    # Stocking & Lewis (1998): in a test the parameters of the examinee's estimated
    # ability level decide.  Even items have k = 0 below theta-hat 0 and odd items k = 0
    # from 0 up (the others k = 1), so every criterion pick must be odd while the interim
    # estimate is below 0 and even from 0 up.
    bank = structured_bank(2, 120, pretest=0, enemies=False, sets=False)
    d = Design(exposure=Exposure(method="sympson_hetter", parameters_file="x"),
               stopping=Stopping(min_items=12, max_items=12), exposure_strata=(0.0,),
               exposure_parameters=_parity_parameters(bank, 1))
    ctx = build_context(d, bank)
    theta = np.random.default_rng(3).normal(0, 1.5, size=40)
    _, history = run_batch(ctx, theta, seed=8, record_thetas=True)
    low = high = 0
    for _rows, theta_hat, pending, _ in history:
        below = theta_hat < 0
        assert np.all(pending[below] % 2 == 1)
        assert np.all(pending[~below] % 2 == 0)
        low, high = low + below.sum(), high + (~below).sum()
    assert low > 50 and high > 50  # both strata were exercised


def test_identical_strata_give_the_unconditional_test():
    # With the same parameter in every stratum the conditional method is the plain one
    # (Sympson & Hetter 1985): same items, same estimates, bit for bit.
    bank = structured_bank(3, 100, polytomous=6)
    k = {bank.item_ids[i]: 0.3 + 0.6 * (i % 3) / 2 for i in range(0, 94)}
    plain = Design(exposure=Exposure(method="sympson_hetter", parameters_file="x"),
                   stopping=Stopping(min_items=10, max_items=10), exposure_parameters=k)
    cond = with_parameters(plain, {iid: (v, v, v) for iid, v in k.items()}, path="x", strata=(-1.0, 1.0))
    theta = np.random.default_rng(4).normal(size=20)
    a, _ = run_batch(build_context(plain, bank), theta, seed=6)
    b, _ = run_batch(build_context(cond, bank), theta, seed=6)
    assert np.array_equal(a.items, b.items)
    assert np.array_equal(a.theta, b.theta)


def test_conditional_design_batch_equals_one_at_a_time():
    # "One kernel, two drivers": a live session (batch of one) makes the same decisions as
    # the same examinee inside a simulation batch.
    bank = structured_bank(5, 100, polytomous=6)
    rng = np.random.default_rng(2)
    params = {iid: tuple(float(x) for x in rng.uniform(0.1, 1.0, 3)) for iid in bank.item_ids[:94]}
    d = Design(exposure=Exposure(method="sympson_hetter", parameters_file="x"),
               stopping=Stopping(min_items=10, max_items=10), exposure_strata=(-0.5, 0.5), exposure_parameters=params)
    ctx = build_context(d, bank)
    theta = np.random.default_rng(11).normal(size=12)
    batch, _ = run_batch(ctx, theta, seed=5)
    for i in (0, 4, 11):
        single, _ = run_batch(ctx, theta[i : i + 1], seed=5, start_index=i)
        n = batch.n_given[i]
        assert single.n_given[0] == n
        assert np.array_equal(single.items[0, :n], batch.items[i, :n])
        assert single.theta[0] == batch.theta[i] and single.se[0] == batch.se[i]


# ----------------------------------------------------------------------------------------
# simulation counts and calibration


def test_counts_by_stratum_add_up_to_the_run_counts():
    # An independent recount: administrations per true-ability stratum from the chunks'
    # item lists, and offers = given + withheld, summed over strata, equal the run totals.
    bank = bank_2pl(60, seed=1)
    k = {iid: 0.4 for iid in bank.item_ids[::2]}
    d = with_parameters(Design(stopping=Stopping(min_items=8, max_items=8)), k)
    true = np.random.default_rng(2).normal(size=300)
    cuts = (-0.5, 0.7)
    seen = np.zeros((3, bank.n_items), dtype=np.int64)

    def recount(chunk):
        s = np.searchsorted(cuts, chunk.true_theta, side="right")
        for r in range(chunk.size):
            items = chunk.items[r][chunk.items[r] >= 0]
            np.add.at(seen[s[r]], items, 1)

    res = simulation.simulate(d, bank, true_theta=true, seed=3, count_by_stratum=cuts, on_chunk=recount,
                              chunk_size=128)
    assert np.array_equal(res.administered_by_stratum, seen)
    assert np.array_equal(res.administered_by_stratum.sum(axis=0), res.administered)
    assert np.array_equal(res.offered_by_stratum.sum(axis=0), res.offered)
    assert np.all(res.offered_by_stratum >= res.administered_by_stratum)
    assert res.offered.sum() > res.administered.sum()  # the lottery did withhold items
    plain = simulation.simulate(d, bank, true_theta=true, seed=3)
    assert np.array_equal(plain.theta, res.theta)  # counting changes no decision


def test_conditional_step_is_the_sympson_hetter_step_when_strata_agree():
    # Reference: Sympson & Hetter (1985), k = min(1, r / P(selected)); with every pick made
    # at an estimate in the examinee's true stratum, the conditional step is that formula
    # per stratum (Stocking & Lewis 1998).
    rng = np.random.default_rng(0)
    size = np.array([400, 900, 300])
    selected = rng.integers(0, 400, size=(3, 25))
    pair = np.zeros((3, 3, 25), dtype=np.int64)
    for s in range(3):
        pair[s, s] = selected[s]
    r = 0.2
    new = _updated_conditional(np.ones((3, 25)), pair, pair, size, r, [])
    expected = np.minimum(1.0, r / np.maximum(selected / size[:, None], 1e-300))
    assert np.allclose(new, expected)
    # a stratum's lotteries that also serve another true stratum obey the stricter bound
    pair[0, 1] = 350  # examinees of true stratum 0 picked at an estimate in stratum 1
    new = _updated_conditional(np.ones((3, 25)), pair, pair, size, r, [])
    p0 = pair[0].sum(axis=0) / size[0]
    assert np.allclose(new[1], np.minimum(1.0, np.minimum(r / np.maximum(selected[1] / size[1], 1e-300),
                                                          r / p0)))


@pytest.mark.long_running
def test_conditional_calibration_holds_every_stratum_near_the_target():
    # Reference: Stocking & Lewis (1998): after the conditional parameters are calibrated,
    # the exposure rate conditional on ability stays at or below r in every ability
    # stratum, up to simulation noise; the unconditional method (Sympson & Hetter 1985)
    # bounds only the marginal rate and leaves items far above r within low or high
    # ability strata.  Checked on fresh examinees.  Noise allowance (common practice:
    # about 4 binomial standard errors of the largest of many rates): about 620 examinees
    # per stratum give an SE of 0.017 at r = 0.25, allowance 0.07.
    bank = bank_2pl(150, seed=8)
    design = Design(stopping=Stopping(min_items=10, max_items=10))
    target, cuts = 0.25, (-0.5, 0.5)
    true = np.random.default_rng(9).normal(size=2000)
    population = Population(true_theta=true, seed=2)
    cond = calibrate_sympson_hetter(design, bank, target=target, population=population, max_iterations=10,
                                    strata=cuts, tolerance=0.05)
    plain = calibrate_sympson_hetter(design, bank, target=target, population=population, max_iterations=8)
    assert cond.strata == cuts and all(len(v) == 3 for v in cond.parameters.values())
    assert len(cond.history[-1]["max_exposure_by_stratum"]) == 3
    fresh = np.random.default_rng(10).normal(size=2000)
    n_s = np.bincount(simulation.stratum_of(fresh, cuts), minlength=3)
    assert n_s.min() > 500

    def rates(d):
        res = simulation.simulate(d, bank, true_theta=fresh, seed=99, count_by_stratum=cuts)
        return res.administered_by_stratum / n_s[:, None], res.administered / fresh.size

    cond_rates, cond_marginal = rates(with_parameters(design, cond.parameters, strata=cuts))
    plain_rates, plain_marginal = rates(with_parameters(design, plain.parameters))
    print("max conditional exposure by stratum: conditional", cond_rates.max(axis=1).round(3),
          "unconditional", plain_rates.max(axis=1).round(3))
    assert cond_rates.max(axis=1).max() <= target + 0.07
    assert np.mean(cond_rates > target + 0.05) < 0.02
    assert cond_marginal.max() <= target + 0.05  # the marginal rate follows
    # the contrast: unconditional parameters meet the target only marginally
    assert plain_marginal.max() <= target + 0.05
    assert plain_rates.max(axis=1).max() > target + 0.15


def test_strata_without_examinees_and_bad_cut_points_are_refused():
    bank = bank_2pl(30, seed=2)
    design = Design(stopping=Stopping(min_items=5, max_items=5))
    with pytest.raises(AdaptiveEngineError) as info:
        calibrate_sympson_hetter(design, bank, target=0.3, population=Population(true_theta=np.zeros(50), seed=1),
                                 strata=(1.0,))
    assert info.value.location == "strata" and "[1, inf)" in str(info.value)
    for text in ("1,x", "1,1", "2,1", "", "inf"):
        with pytest.raises(AdaptiveEngineError) as info:
            parse_strata(text)
        assert info.value.location == "strata"
    assert parse_strata(" -1, 0 ,1") == (-1.0, 0.0, 1.0)


# ----------------------------------------------------------------------------------------
# the command line


def test_cli_writes_the_conditional_file_and_refuses_bad_cut_points(tmp_path):
    bank = bank_2pl(60, seed=3)
    bank_file = tmp_path / "bank.csv"
    write_bank_csv(bank, bank_file)
    design_file = tmp_path / "d.toml"
    design_file.write_text("[stopping]\nmin_items = 8\nmax_items = 8\n")
    out = tmp_path / "cond.csv"
    runner = CliRunner()
    args = ["exposure", "calibrate", str(design_file), "--bank", str(bank_file), "--target", "0.3",
            "--out", str(out), "--examinees", "300", "--iterations", "2"]
    r = runner.invoke(main, args + ["--conditional-strata=-0.5,0.5"])
    # 2 iterations do not reach the target: exit code 3 (not converged), the file is written all the same
    assert r.exit_code == 3, r.output
    assert "[-inf,-0.5)" in r.output and "[0.5,inf)" in r.output
    got = parse_exposure_file(out.read_text())
    assert got.strata == (-0.5, 0.5) and set(got.parameters) == set(bank.item_ids)
    # the file plugs into a design
    (tmp_path / "use.toml").write_text('[exposure]\nmethod = "sympson_hetter"\nparameters_file = "cond.csv"\n'
                                       "[stopping]\nmin_items = 8\nmax_items = 8\n")
    assert read_design(tmp_path / "use.toml").exposure_strata == (-0.5, 0.5)
    bad = tmp_path / "bad.csv"
    r = runner.invoke(main, ["exposure", "calibrate", str(design_file), "--bank", str(bank_file), "--target", "0.3",
                             "--out", str(bad), "--conditional-strata", "0.5,-0.5"])
    assert r.exit_code == 2
    assert "--conditional-strata" in r.output and "ascending" in r.output
    assert not bad.exists()
    r = runner.invoke(main, ["exposure", "calibrate", "--help"])
    assert "--conditional-strata" in r.output


def test_shipped_conditional_example_fits_its_bank():
    if not DEMO_BANK.exists():
        pytest.skip("demo bank not generated (run item_banks/make_demo_banks.py)")
    bank = load_bank(DEMO_BANK)
    design = read_design(REPO / "simulations" / "conditional_sympson_hetter.toml")
    assert check_design_against_bank(design, bank) == []
    operational = {str(i) for i, s in zip(bank.item_ids, bank.status) if s == "operational"}
    assert set(design.exposure_parameters) == operational
    assert design.exposure_strata == (-1.0, 0.0, 1.0)
    values = np.array(list(design.exposure_parameters.values()))
    assert values.shape == (len(operational), 4) and np.all((values >= 0) & (values <= 1))
    assert np.any(values < 1)  # calibrated: some items are restricted


def test_live_sessions_replay_simulated_examinees_of_the_conditional_example():
    # "One kernel, two drivers": a live session (stored in SQLite, its design and conditional
    # parameters rebuilt from the store) started with a simulated examinee's
    # seed gets the same items, interim estimates and stop as in the simulation.
    if not DEMO_BANK.exists():
        pytest.skip("demo bank not generated (run item_banks/make_demo_banks.py)")
    from adaptive_engine.live.session import ProcessCache, session_result, start_session, submit_answer
    from adaptive_engine.live.store import open_store

    bank = load_bank(DEMO_BANK)
    design = read_design(REPO / "simulations" / "conditional_sympson_hetter.toml")
    ctx = build_context(design, bank)
    theta = np.random.default_rng(5).normal(0, 1.5, 6)
    chunk = simulation.run_chunk(ctx, seed=77, start=10, true_theta=theta)
    with open_store(":memory:") as store:
        for i in range(chunk.size):
            # answers are served by another "process" than the start, whose context is built
            # from the design stored in SQLite (conditional parameters and strata included)
            cache = ProcessCache()
            n = int((chunk.items[i] >= 0).sum())
            reply = start_session(store, design, bank, seed=int(chunk.seeds[i]), cache=ProcessCache())
            for pos in range(n):
                item = bank.item_ids[chunk.items[i, pos]]
                assert reply["item_id"] == item, f"examinee {i} diverged at item {pos + 1}"
                reply = submit_answer(store, reply["session_id"], item, int(chunk.responses[i, pos]), cache=cache)
                assert reply["theta"] == chunk.interim_theta[i, pos]
            assert reply["done"]
            assert session_result(store, reply["session_id"])["stop_reason"] == chunk.stop_reason[i]
