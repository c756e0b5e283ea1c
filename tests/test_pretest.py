"""Pretest calibration from a session store (fixed-parameter calibration).

The stores are built through the session store's own API (``open_store``, ``put_bank``,
``insert_session``, ``append_events``) with simulated answers: each session gets a random
set of operational and pretest items, so every item is answered by a cross-section of the
population.  One test runs real adaptive sessions end to end.  Examinees are drawn from N(0.4, 1.1^2),
not the N(0, 1) the calibration assumes: pretest items estimated through the operational
items' posteriors must still come out on the bank's (generating) scale, which a free MML
calibration with a N(0, 1) population would not give (Kim 2006, Journal of Educational
Measurement 43, 355-381, on fixed-parameter calibration; value of the shift our choice).
"""

from __future__ import annotations

import csv
import json

import numpy as np
import pytest

from adaptive_engine.bank import bank_from_records, load_bank
from adaptive_engine.calibration.pretest import PromotionRules, calibrate_pretest
from adaptive_engine.design import Design
from adaptive_engine.errors import CalibrationError, SessionError
from adaptive_engine.irt import models
from adaptive_engine.live.store import bank_content, open_store, read_bank_answers

#: seconds in all: started first on the test workers (tests/conftest.py)
pytestmark = pytest.mark.long_running

N_OPERATIONAL = 30
PRETEST = {  # item id -> (a, b) of the generating 2PL
    "new1": (1.2, -0.8), "new2": (0.9, 0.3), "new3": (1.6, 1.0), "new4": (1.0, 0.0),
}


def _bank(rng):
    records = [dict(item_id=f"op{j:02d}", model="2PL", a=float(rng.uniform(0.8, 2.0)),
                    b=float(rng.uniform(-2, 2))) for j in range(N_OPERATIONAL)]
    records += [dict(item_id=iid, model="2PL", a=1.0, b=0.0, status="pretest") for iid in PRETEST]
    return bank_from_records(records)


def _truth(bank, values):
    """The generating bank: ``bank`` with the pretest items' true (a, b) put in."""
    a, b = bank.a.copy(), bank.b.copy()
    for iid, (ta, tb) in values.items():
        a[bank.index_of[iid]], b[bank.index_of[iid]] = ta, tb
    return bank.evolve(a=a, b=b)


def _store(path, bank, rng, *, n_sessions=2500, rare=None, truth=None, n_given=15):
    """A session store of ``bank`` with simulated answers drawn from ``truth`` (default: the
    2PL PRETEST values); each session takes ``n_given`` operational and 2 pretest items."""
    truth = _truth(bank, PRETEST) if truth is None else truth
    operational = [str(i) for i, s in zip(bank.item_ids, bank.status) if s == "operational"]
    pretest_ids = [str(i) for i, s in zip(bank.item_ids, bank.status) if s == "pretest"]
    scored = set(operational)
    theta = rng.normal(0.4, 1.1, n_sessions)
    sessions, events = [], []
    with open_store(path) as store, store.writing():
        bank_id = store.put_bank(bank)
        design_id = store.put_design(Design())
        for s in range(n_sessions):
            sid = f"s{s:05d}"
            sessions.append(dict(session_id=sid, examinee=f"e{s}", bank_id=bank_id, design_id=design_id,
                                 status="finished", seed=s, created_at="", updated_at="", state="{}",
                                 result="{}"))
            ops = list(rng.choice(operational, n_given, replace=False))
            pre = list(rng.choice(pretest_ids, 2, replace=False))
            if rare and s >= 40:
                pre = [p for p in pre if p != rare]
            given = ops + pre
            rows = truth.indices(given)
            probs = models.probabilities(truth.params.take(rows), np.full(len(given), theta[s]))
            answers = (rng.random((len(given), 1)) > np.cumsum(probs, axis=1)).sum(axis=1)
            seq = 0
            for item, x in zip(given, answers):
                for kind in ("item_given", "answer"):
                    seq += 1
                    events.append(dict(session_id=sid, seq=seq, kind=kind, item_id=item,
                                       response=int(x) if kind == "answer" else None,
                                       scored=int(item in scored), elapsed=1.0, created_at="",
                                       rng_state=f'{{"key": 1, "position": {seq}}}'))  # as json.dumps
        for row in sessions:
            store.insert_session(row)
        store.append_events(events)
    return path


def _calibrate(path, *, bank_id=None, bank=None, **options):
    """Read the store as the command line does, then calibrate."""
    stored = read_bank_answers(path, bank_id=bank_id, bank=bank)
    return calibrate_pretest(stored.events, bank=stored.bank, bank_id=stored.bank_id, **options)


def test_pretest_items_land_on_the_bank_scale(tmp_path):
    rng = np.random.default_rng(41)
    bank = _bank(rng)
    path = _store(tmp_path / "store.db", bank, rng, rare="new4")
    result = _calibrate(path, bank_id=bank_content(bank)[0], rules=PromotionRules(min_answers=300, max_se=0.25))
    rows = {r["item_id"]: r for r in result.rows}
    assert set(rows) == set(PRETEST)
    print()
    for iid, (a, b) in PRETEST.items():
        print(f"{iid}: a {rows[iid]['a']:.3f} (true {a}), b {rows[iid]['b']:.3f} (true {b}), "
              f"answers {rows[iid]['answers']}, ready {rows[iid]['ready']} {rows[iid]['reasons']}")
    for iid in ("new1", "new2", "new3"):
        a, b = PRETEST[iid]
        assert rows[iid]["b"] == pytest.approx(b, abs=0.2)
        assert rows[iid]["a"] == pytest.approx(a, abs=0.3)
        assert rows[iid]["ready"], rows[iid]["reasons"]
    # new4 was given to only a few sessions: estimated, but not ready
    assert not rows["new4"]["ready"] and "answers <" in rows["new4"]["reasons"]
    assert list(result.bank.status) == ["pretest"] * 4
    assert result.summary["sessions"] == 2500
    # the population is estimated on the bank's scale (true N(0.4, 1.1^2))
    assert result.summary["population_mean"] == pytest.approx(0.4, abs=0.1)
    assert result.summary["population_sd"] == pytest.approx(1.1, abs=0.1)


def test_bank_lookup_and_errors(tmp_path):
    rng = np.random.default_rng(42)
    bank = _bank(rng)
    bank_id, _ = bank_content(bank)
    path = _store(tmp_path / "store.db", bank, rng, n_sessions=300)
    result = _calibrate(path, bank=bank, rules=PromotionRules(min_answers=10, max_se=5.0, min_fit_p=0.0))
    assert result.summary["bank_id"] == bank_id
    # the store's copy of the bank is the same bank
    stored = read_bank_answers(path, bank_id=bank_id)
    assert stored.bank.item_ids.tolist() == bank.item_ids.tolist()
    np.testing.assert_array_equal(stored.bank.a, bank.a)
    with pytest.raises(SessionError, match="no bank with id 'nope'"):
        read_bank_answers(path, bank_id="nope")
    other = bank.evolve(a=bank.a * 1.01)
    with pytest.raises(SessionError, match="bank: this bank is not in the store"):
        read_bank_answers(path, bank=other)
    with pytest.raises(SessionError, match="no session store at"):
        read_bank_answers(tmp_path / "missing.db", bank_id=bank_id)
    # reading changes nothing in the file
    before = path.read_bytes()
    read_bank_answers(path, bank_id=bank_id)
    assert path.read_bytes() == before
    # an answer to an item the bank does not hold is located at its event
    with open_store(path) as store, store.writing():
        store.append_events([dict(session_id="s00000", seq=1000, kind="answer", item_id="ghost", response=1,
                                  scored=0, created_at="")])
    stored = read_bank_answers(path, bank_id=bank_id)
    ghost = [e for e in stored.events if e[2] == "ghost"][0][0]
    with pytest.raises(CalibrationError, match=rf"event {ghost}: item 'ghost' is not in the bank"):
        calibrate_pretest(stored.events, bank=stored.bank, bank_id=bank_id)
    with pytest.raises(CalibrationError, match="no answers recorded for bank 'b'"):
        calibrate_pretest([], bank=bank, bank_id="b")
    # a response outside an item's categories is located at its event, in one plain sentence
    first = next(e for e in stored.events if e[2] != "ghost")
    events = [(first[0], first[1], first[2], 7, first[4])]
    with pytest.raises(CalibrationError) as caught:
        calibrate_pretest(events, bank=bank, bank_id=bank_id)
    problem = caught.value.problems[0]
    assert problem.location == f"event {first[0]}"
    assert problem.message == f"response 7 is outside the categories 0..1 of item {first[2]}"


def test_a_file_that_is_not_a_store_is_refused_and_left_alone(tmp_path):
    import sqlite3

    path = tmp_path / "other.db"
    with sqlite3.connect(path) as conn:
        conn.execute("CREATE TABLE sessions (x)")
    conn.close()
    before = path.read_bytes()
    with pytest.raises(SessionError, match="not a session store: table 'events' is missing"):
        read_bank_answers(path, bank_id="b")
    assert path.read_bytes() == before


def test_pretest_cli(tmp_path):
    from click.testing import CliRunner

    from adaptive_engine.cli import main

    rng = np.random.default_rng(43)
    bank = _bank(rng)
    path = _store(tmp_path / "store.db", bank, rng, n_sessions=400, rare="new4")
    bank_id, _ = bank_content(bank)
    out, report = tmp_path / "pretest.json", tmp_path / "pretest.csv"
    runner = CliRunner()
    res = runner.invoke(main, ["pretest", "calibrate", "--db", str(path), "--bank-id", bank_id,
                               "--out", str(out), "--report", str(report), "--min-answers", "150",
                               "--max-se", "0.6", "--min-fit-p", "0.001", "--json"])
    assert res.exit_code == 0, res.output
    summary = json.loads(res.stdout)
    assert summary["pretest_items"] == 4 and summary["sessions"] == 400
    ready = sorted(r["item_id"] for r in summary["items"] if r["ready"])
    assert 0 < len(ready) < 4, summary["items"]  # the thresholds above split the items
    # by default the bank file holds only the ready items ...
    written = load_bank(out)
    assert sorted(written.item_ids) == ready and set(written.status) == {"pretest"}
    assert summary["items_written"] == len(ready)
    # ... and the report every item, with the flag and the reasons
    report_rows = list(csv.DictReader(report.open()))
    assert sorted(r["item_id"] for r in report_rows) == sorted(PRETEST)
    assert sorted(r["item_id"] for r in report_rows if r["ready"] == "True") == ready
    assert all(r["reasons"] for r in report_rows if r["ready"] != "True")
    everything = tmp_path / "all.json"
    res = runner.invoke(main, ["pretest", "calibrate", "--db", str(path), "--bank-id", bank_id,
                               "--out", str(everything), "--min-answers", "150", "--max-se", "0.6",
                               "--min-fit-p", "0.001", "--include-not-ready"])
    assert res.exit_code == 0, res.output
    assert sorted(load_bank(everything).item_ids) == sorted(PRETEST)
    # nothing ready: no bank file, a warning on stderr, the report still written
    none_out, none_report = tmp_path / "none.json", tmp_path / "none.csv"
    res = runner.invoke(main, ["pretest", "calibrate", "--db", str(path), "--bank-id", bank_id,
                               "--out", str(none_out), "--report", str(none_report), "--min-answers", "100000",
                               "--json"])
    assert res.exit_code == 0, res.output
    assert not none_out.exists() and none_report.exists()
    assert "warning: no pretest item is ready" in res.stderr and json.loads(res.stdout)["out"] is None
    res = runner.invoke(main, ["pretest", "calibrate", "--db", str(path), "--bank-id", "x", "--out", str(out)])
    assert res.exit_code == 2 and "--bank-id: no bank with id 'x'" in res.output
    res = runner.invoke(main, ["pretest", "calibrate", "--db", str(path), "--out", str(tmp_path / "y.json")])
    assert res.exit_code == 2 and not (tmp_path / "y.json").exists()


def test_rasch_pretest_items_keep_the_operational_slope(tmp_path):
    # Fixed-parameter calibration (Kim 2006): in a Rasch bank the one common slope is part of
    # the scale, so pretest 1PL items must be held at the operational value (0.8 here), not
    # given a new slope estimated from the pretest answers alone.  The bank's placeholder
    # slope of the pretest items (1.0) must not be used either.
    rng = np.random.default_rng(44)
    records = [dict(item_id=f"op{j:02d}", model="1PL", a=0.8, b=float(b))
               for j, b in enumerate(np.linspace(-2, 2, 24))]
    true_b = {"r1": -0.6, "r2": 0.2, "r3": 0.9}
    records += [dict(item_id=iid, model="1PL", a=1.0, b=0.0, status="pretest") for iid in true_b]
    bank = bank_from_records(records)
    truth = _truth(bank, {iid: (0.8, b) for iid, b in true_b.items()})
    path = _store(tmp_path / "store.db", bank, rng, n_sessions=900, truth=truth, n_given=12)
    result = _calibrate(path, bank_id=bank_content(bank)[0], rules=PromotionRules(min_answers=100, max_se=0.3))
    rows = {r["item_id"]: r for r in result.rows}
    assert result.summary["held_slopes"] == {"1PL": 0.8}
    np.testing.assert_array_equal(result.bank.a, 0.8)
    for iid, b in true_b.items():
        assert rows[iid]["a"] == 0.8
        assert rows[iid]["b"] == pytest.approx(b, abs=0.2), rows[iid]
        assert rows[iid]["parameters"] == 1


def test_partial_credit_pretest_items_keep_the_operational_slope(tmp_path):
    # PCM bank: GPCM items that all share one slope (0.9).  Pretest GPCM items keep it; only
    # their step parameters are estimated (Muraki 1992 GPCM with a fixed common slope).
    rng = np.random.default_rng(45)
    records = [dict(item_id=f"op{j:02d}", model="GPCM", a=0.9,
                    thresholds=[float(c - 0.8), float(c), float(c + 0.8)])
               for j, c in enumerate(np.linspace(-1.5, 1.5, 16))]
    true_steps = {"p1": [-1.0, 0.0, 0.7], "p2": [-0.4, 0.5, 1.2]}
    records += [dict(item_id=iid, model="GPCM", a=1.3, thresholds=[-1.0, 0.0, 1.0], status="pretest")
                for iid in true_steps]
    bank = bank_from_records(records)
    thresholds = bank.thresholds.copy()
    for iid, steps in true_steps.items():
        thresholds[bank.index_of[iid]] = steps
    truth = bank.evolve(a=np.full(len(bank), 0.9), thresholds=thresholds)
    path = _store(tmp_path / "store.db", bank, rng, n_sessions=700, truth=truth, n_given=8)
    result = _calibrate(path, bank_id=bank_content(bank)[0], rules=PromotionRules(min_answers=100, max_se=0.5))
    assert result.summary["held_slopes"] == {"GPCM": 0.9}
    np.testing.assert_array_equal(result.bank.a, 0.9)
    for iid, steps in true_steps.items():
        row = result.bank.index_of[iid]
        np.testing.assert_allclose(result.bank.thresholds[row], steps, atol=0.3)
        assert {r["item_id"]: r for r in result.rows}[iid]["parameters"] == 3


def test_pretest_slopes_in_the_units_of_a_normal_metric_bank(tmp_path):
    # A bank on the normal-ogive metric (D = 1.702; Haley 1952 / Camilli 1994): answers are
    # generated with P = expit(1.702 a (theta - b)), so the pretest slopes must come back in
    # the bank's units (true a), not 1.702 times larger, and the bank written keeps D.
    rng = np.random.default_rng(46)
    records = [dict(item_id=f"op{j:02d}", model="2PL", a=float(rng.uniform(0.5, 1.2)),
                    b=float(rng.uniform(-2, 2))) for j in range(N_OPERATIONAL)]
    true = {"n1": (0.7, -0.5), "n2": (0.55, 0.4), "n3": (0.95, 0.9)}
    records += [dict(item_id=iid, model="2PL", a=1.0, b=0.0, status="pretest") for iid in true]
    bank = bank_from_records(records, scaling=1.702)
    path = _store(tmp_path / "store.db", bank, rng, n_sessions=1500, truth=_truth(bank, true))
    result = _calibrate(path, bank_id=bank_content(bank)[0])
    assert result.bank.scaling == 1.702 and result.summary["scaling"] == 1.702
    rows = {r["item_id"]: r for r in result.rows}
    for iid, (a, b) in true.items():
        assert rows[iid]["a"] == pytest.approx(a, rel=0.25), rows[iid]
        assert rows[iid]["b"] == pytest.approx(b, abs=0.25), rows[iid]


LIVE_DESIGN = """
[opening]
theta = 0.0

[scoring]
method = "eap"

[selection]
criterion = "max_fisher_information"

[exposure]
method = "none"

[blueprint]
pretest_positions = [3, 7]

[stopping]
min_items = 12
max_items = 12
"""


def test_pretest_calibration_of_real_live_sessions(tmp_path):
    # End to end through the embedding API: sessions run by start_session/submit_answer on a
    # design that seeds pretest items, written by the real session store; then pretest
    # calibration (library and CLI) reads that store.  A change of the store's tables or
    # event log that the calibration does not follow breaks this test.
    from click.testing import CliRunner

    from adaptive_engine import api
    from adaptive_engine.cli import main

    rng = np.random.default_rng(47)
    records = [dict(item_id=f"MV-{j:03d}", model="2PL", a=float(rng.uniform(0.9, 1.8)), b=float(b))
               for j, b in enumerate(np.linspace(-2.5, 2.5, 40))]
    true = {"MV-P1": (1.1, -0.4), "MV-P2": (1.4, 0.5)}
    records += [dict(item_id=iid, model="2PL", a=1.0, b=0.0, status="pretest") for iid in true]
    bank = bank_from_records(records, name="meridian valley live")
    truth = _truth(bank, true)
    design_file = tmp_path / "live.toml"
    design_file.write_text(LIVE_DESIGN)
    design = api.read_design(design_file)
    store_path = tmp_path / "sessions.db"
    store = api.open_store(store_path)
    n_sessions = 320
    for s in range(n_sessions):
        theta = rng.normal(0.3, 1.0)
        reply = api.start_session(store, design, bank, examinee=f"MV-cand-{s:04d}", seed=s)
        while not reply["done"]:
            row = truth.index_of[reply["item_id"]]
            p = models.probabilities(truth.params.take(np.array([row])), np.array([theta]))[0]
            reply = api.submit_answer(store, reply["session_id"], reply["item_id"], int(rng.random() < p[1]))
    store.close()
    result = _calibrate(store_path, bank=bank, rules=PromotionRules(min_answers=150, max_se=0.5))
    assert result.summary["sessions"] == n_sessions
    assert result.summary["pretest_answers"] == 2 * n_sessions
    assert result.summary["operational_answers"] == 12 * n_sessions
    rows = {r["item_id"]: r for r in result.rows}
    assert set(rows) == set(true)
    for iid, (a, b) in true.items():
        # Reference: the generating values; ~320 answers give SE(b) ~ 0.1, SE(a) ~ 0.15
        assert rows[iid]["b"] == pytest.approx(b, abs=0.35), rows[iid]
        assert rows[iid]["a"] == pytest.approx(a, abs=0.5), rows[iid]
    out, report = tmp_path / "pretest.json", tmp_path / "pretest.csv"
    res = CliRunner().invoke(main, ["pretest", "calibrate", "--db", str(store_path), "--bank-id",
                                    result.summary["bank_id"], "--out", str(out), "--report", str(report),
                                    "--min-answers", "150", "--max-se", "0.5", "--include-not-ready", "--json"])
    assert res.exit_code == 0, res.output
    summary = json.loads(res.stdout)
    assert summary["sessions"] == n_sessions and summary["pretest_items"] == 2
    written = load_bank(out)
    for iid in true:
        assert written.a[written.index_of[iid]] == pytest.approx(rows[iid]["a"], rel=1e-6)
