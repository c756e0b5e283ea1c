"""Pretest calibration from a session store (fixed-parameter calibration).

The store is built here with sqlite-utils using the session-store contract's tables
(sessions, banks, events) and simulated answers.  Examinees are drawn from N(0.4, 1.1^2),
not the N(0, 1) the calibration assumes: pretest items estimated through the operational
items' posteriors must still come out on the bank's (generating) scale, which a free MML
calibration with a N(0, 1) population would not give (Kim 2006, Journal of Educational
Measurement 43, 355-381, on fixed-parameter calibration; value of the shift our choice).
"""

from __future__ import annotations

import json

import numpy as np
import pytest
import sqlite_utils
from scipy.special import expit

from adaptive_engine.bank import bank_from_records
from adaptive_engine.bank_io import bank_to_json_text
from adaptive_engine.calibration.pretest import PromotionRules, calibrate_pretest
from adaptive_engine.errors import CalibrationError

N_OPERATIONAL = 30
PRETEST = {  # item id -> (a, b) of the generating 2PL
    "new1": (1.2, -0.8), "new2": (0.9, 0.3), "new3": (1.6, 1.0), "new4": (1.0, 0.0),
}


def _bank(rng):
    records = [dict(item_id=f"op{j:02d}", model="2PL", a=float(rng.uniform(0.8, 2.0)),
                    b=float(rng.uniform(-2, 2))) for j in range(N_OPERATIONAL)]
    records += [dict(item_id=iid, model="2PL", a=1.0, b=0.0, status="pretest") for iid in PRETEST]
    return bank_from_records(records)


def _store(path, bank, rng, *, n_sessions=2500, bank_id="bank-main", rare=None):
    db = sqlite_utils.Database(path)
    db["banks"].create({"bank_id": str, "name": str, "content": str}, pk="bank_id")
    db["sessions"].create({"session_id": str, "examinee": str, "bank_id": str, "design_id": str,
                           "status": str, "seed": int, "created_at": str, "updated_at": str,
                           "state": str, "result": str}, pk="session_id")
    db["events"].create({"event_id": int, "session_id": str, "seq": int, "kind": str, "item_id": str,
                         "response": int, "scored": int, "theta": float, "se": float, "criterion": float,
                         "eligible": int, "rng_state": str, "elapsed": float, "created_at": str},
                        pk="event_id")
    db["banks"].insert(dict(bank_id=bank_id, name="demo", content=bank_to_json_text(bank)))
    theta = rng.normal(0.4, 1.1, n_sessions)
    sessions, events = [], []
    event_id = 0
    for s in range(n_sessions):
        sid = f"s{s:05d}"
        sessions.append(dict(session_id=sid, examinee=f"e{s}", bank_id=bank_id, design_id="d",
                             status="finished", seed=s, created_at="", updated_at="", state="{}",
                             result="{}"))
        ops = rng.choice(N_OPERATIONAL, 15, replace=False)
        pre = list(rng.choice(list(PRETEST), 2, replace=False))
        if rare and s >= 40:
            pre = [p for p in pre if p != rare]
        seq = 0
        for item in [f"op{j:02d}" for j in ops] + pre:
            j = bank.index_of[item]
            a, b = (bank.a[j], bank.b[j]) if item.startswith("op") else PRETEST[item]
            x = int(rng.random() < expit(a * (theta[s] - b)))
            for kind in ("item_given", "answer"):
                event_id += 1
                seq += 1
                events.append(dict(event_id=event_id, session_id=sid, seq=seq, kind=kind, item_id=item,
                                   response=x if kind == "answer" else None,
                                   scored=int(item.startswith("op")), theta=None, se=None, criterion=None,
                                   eligible=None, rng_state=json.dumps({"key": 1, "position": seq}),
                                   elapsed=1.0, created_at=""))
    db["sessions"].insert_all(sessions)
    db["events"].insert_all(events, batch_size=5000)
    return path


def test_pretest_items_land_on_the_bank_scale(tmp_path):
    rng = np.random.default_rng(41)
    bank = _bank(rng)
    path = _store(tmp_path / "store.db", bank, rng, rare="new4")
    result = calibrate_pretest(path, bank_id="bank-main", rules=PromotionRules(min_answers=300, max_se=0.25))
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
    from adaptive_engine.store import bank_content

    rng = np.random.default_rng(42)
    bank = _bank(rng)
    bank_id, _ = bank_content(bank)
    path = _store(tmp_path / "store.db", bank, rng, n_sessions=300, bank_id=bank_id)
    result = calibrate_pretest(path, bank=bank, rules=PromotionRules(min_answers=10, max_se=5.0, min_fit_p=0.0))
    assert result.summary["bank_id"] == bank_id
    with pytest.raises(CalibrationError, match="no bank with id 'nope'"):
        calibrate_pretest(path, bank_id="nope")
    other = bank.evolve(a=bank.a * 1.01)
    with pytest.raises(CalibrationError, match="--bank: this bank is not in the store"):
        calibrate_pretest(path, bank=other)
    db = sqlite_utils.Database(path)
    db["events"].update(2, {"item_id": "ghost"})
    with pytest.raises(CalibrationError, match=r"event 2: item 'ghost' is not in the bank"):
        calibrate_pretest(path, bank_id=bank_id)
    with pytest.raises(CalibrationError, match="no such session store"):
        calibrate_pretest(tmp_path / "missing.db", bank_id=bank_id)


def test_pretest_cli(tmp_path):
    from click.testing import CliRunner

    from adaptive_engine.bank import load_bank
    from adaptive_engine.cli import main

    rng = np.random.default_rng(43)
    bank = _bank(rng)
    path = _store(tmp_path / "store.db", bank, rng, n_sessions=400)
    out, report = tmp_path / "pretest.json", tmp_path / "pretest.csv"
    runner = CliRunner()
    res = runner.invoke(main, ["pretest", "calibrate", "--db", str(path), "--bank-id", "bank-main",
                               "--out", str(out), "--report", str(report), "--min-answers", "150",
                               "--max-se", "0.6", "--min-fit-p", "0.001"])
    assert res.exit_code == 0, res.output
    summary = json.loads(res.output)
    assert summary["pretest_items"] == 4 and summary["sessions"] == 400
    written = load_bank(out)
    assert sorted(written.item_ids) == sorted(PRETEST) and set(written.status) == {"pretest"}
    header = report.read_text().splitlines()[0].split(",")
    assert "ready" in header and "reasons" in header
    res = runner.invoke(main, ["pretest", "calibrate", "--db", str(path), "--bank-id", "x", "--out", str(out)])
    assert res.exit_code == 2 and "--bank-id: no bank with id 'x'" in res.output
    res = runner.invoke(main, ["pretest", "calibrate", "--db", str(path), "--out", str(tmp_path / "y.json")])
    assert res.exit_code == 2 and not (tmp_path / "y.json").exists()
