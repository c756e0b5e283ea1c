"""The two-dimensional licensing exam live: session CLI and HTTP API.

The library is the oracle (its sessions replay simulated examinees, tests/test_multidimensional_kernel.py):
over HTTP a session gets exactly the replies the Python API gives for the same seed and
answers, with the ability as a list (one entry per dimension); the OpenAPI document's
schema admits it (validated with jsonschema, a general-purpose library).
"""

from __future__ import annotations

import json
import warnings
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner

from adaptive_engine.bank import load_bank
from adaptive_engine.cli import main
from adaptive_engine.design.toml_file import read_design
from adaptive_engine.live.session import ProcessCache, start_session, submit_answer
from adaptive_engine.live.store import open_store

ROOT = Path(__file__).resolve().parents[1]
DESIGN_FILE = ROOT / "simulations" / "licensing_two_dimensional.toml"
BANK_FILE = ROOT / "item_banks" / "meridian_valley_operator_2d.json"


def _short_design(tmp_path) -> Path:
    """The demo design cut to 15 items (the test stays quick)."""
    path = tmp_path / "licensing_two_dimensional.toml"
    path.write_text(DESIGN_FILE.read_text().replace("max_items = 60", "max_items = 15"))
    return path


def _answers(n=80):
    return [int(x) for x in np.random.default_rng(42).random(n) < 0.6]


def _python_replies(store_path, design, bank, seed, answers):
    with open_store(store_path) as ref:
        cache = ProcessCache()
        out = [start_session(ref, design, bank, seed=seed, cache=cache, examinee="MV2-0001")]
        while not out[-1]["done"]:
            out.append(submit_answer(ref, out[-1]["session_id"], out[-1]["item_id"], answers[len(out) - 1],
                                     cache=cache))
    return out


def test_session_cli_runs_the_two_dimensional_exam(tmp_path):
    db = str(tmp_path / "s.db")
    design_file = _short_design(tmp_path)
    run = CliRunner().invoke
    started = run(main, ["session", "start", "--db", db, "--design", str(design_file), "--bank", str(BANK_FILE),
                         "--seed", "7", "--json"])
    assert started.exit_code == 0, started.output
    reply = json.loads(started.output)
    assert reply["theta"] == [0.0, 0.0] and reply["se"] == [1.0, 1.0]
    answers = _answers()
    k = 0
    while not reply["done"]:
        out = run(main, ["session", "answer", "--db", db, reply["session_id"], reply["item_id"], str(answers[k]),
                         "--json"])
        assert out.exit_code == 0, out.output
        reply = json.loads(out.output)
        k += 1
    assert reply["stop_reason"] in ("se_reached", "max_items")
    if reply["stop_reason"] == "se_reached":
        assert max(reply["result"]["se"]) <= 0.3
    shown = json.loads(run(main, ["session", "show", "--db", db, reply["session_id"], "--json"]).output)
    # the text forms show the ability vector too
    text = run(main, ["session", "show", "--db", db, reply["session_id"]])
    assert text.exit_code == 0 and "theta (" in text.output, text.output
    assert len(shown["administered"]) == k and len(shown["administered"][-1]["theta"]) == 2
    expected = _python_replies(tmp_path / "ref.db", read_design(design_file), load_bank(BANK_FILE), 7, answers)
    assert reply["result"] == expected[-1]["result"]
    refused = run(main, ["session", "start", "--db", db, "--design", str(design_file), "--bank", str(BANK_FILE),
                         "--prior-mean", "0.5"])
    assert refused.exit_code == 2 and "--prior-mean" in refused.output


def test_http_api_runs_the_two_dimensional_exam(tmp_path):
    pytest.importorskip("starlette", reason="the service tests need the 'service' extra (starlette)")
    jsonschema = pytest.importorskip("jsonschema")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        from starlette.testclient import TestClient
    from adaptive_engine.live.releases import publish_release
    from adaptive_engine.live.service import ServiceSettings, create_app
    from adaptive_engine.live.tokens import new_token

    design, bank = read_design(_short_design(tmp_path)), load_bank(BANK_FILE)
    location = str(tmp_path / "store.db")
    _, secret = new_token(tmp_path / "tokens.toml", name="exam-app", role="delivery")
    with open_store(location) as store:
        publish_release(store, design, bank, name="meridian-2d")
    app = create_app(ServiceSettings(store=location, tokens=str(tmp_path / "tokens.toml")))
    headers = {"Authorization": f"Bearer {secret}"}
    answers = _answers()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        with TestClient(app) as client:
            doc = client.get("/openapi.json").json()
            body = {"release": "meridian-2d", "examinee": "MV2-0001", "seed": 11}
            started = client.post("/v1/sessions", json=body, headers=headers)
            assert started.status_code == 201, started.text
            replies = [started.json()]
            while not replies[-1]["done"]:
                r = replies[-1]
                got = client.post(f"/v1/sessions/{r['session_id']}/answers", headers=headers,
                                  json={"item_id": r["item_id"], "response": answers[len(replies) - 1]})
                assert got.status_code == 200, got.text
                replies.append(got.json())
    expected = _python_replies(tmp_path / "ref.db", design, bank, 11, answers)
    strip = [{k: v for k, v in r.items() if k != "session_id"} for r in replies]
    assert strip == [{k: v for k, v in r.items() if k != "session_id"} for r in expected]
    assert len(replies[-1]["result"]["theta"]) == 2
    # the OpenAPI document admits an ability vector in every reply (JSON Schema, draft 2020-12)
    schema = {**doc["components"]["schemas"]["SessionReply"], "components": doc["components"]}
    validator = jsonschema.Draft202012Validator(schema)
    for r in replies:
        validator.validate(r)


def test_simulate_cli_writes_the_two_dimensional_study_and_refuses_a_true_bank(tmp_path):
    run = CliRunner().invoke
    design_file = _short_design(tmp_path)
    out = tmp_path / "study"
    got = run(main, ["simulate", str(design_file), "--bank", str(BANK_FILE), "--theta", "correlated_normal:0,1,0.6",
                     "--examinees", "30", "--seed", "3", "--out", str(out), "--json"])
    assert got.exit_code == 0, got.output
    summary = json.loads((out / "summary.json").read_text())
    assert set(summary["dimensions"]) == {"treatment_operations", "regulation_and_safety"}
    for m in list(summary["dimensions"].values()) + [summary["composite"]]:
        assert {"bias", "rmse", "mean_se", "rmse_to_mean_se", "correlation_with_truth"} <= set(m)
    lines = (out / "examinees.csv").read_text().splitlines()
    assert len(lines) == 31 and lines[0].startswith("examinee,seed,true_treatment_operations,")
    # the same study in code gives the same estimates (the CLI adds nothing to the kernel)
    from adaptive_engine.simulation.multidimensional_engine import simulate_multidimensional
    from adaptive_engine.simulation.population import draw_vectors, parse_ability_spec

    true = draw_vectors(parse_ability_spec("correlated_normal:0,1,0.6"), 30, 3, 2)
    res = simulate_multidimensional(read_design(design_file), load_bank(BANK_FILE), true_theta=true, seed=3)
    assert summary["dimensions"]["treatment_operations"]["rmse"] == pytest.approx(
        float(np.sqrt(np.mean((res.theta[:, 0] - true[:, 0]) ** 2))), rel=1e-12)
    # tune runs for such a design (tests/test_multidimensional_tune.py); a true bank is refused at its flag
    refused = run(main, ["tune", str(design_file), "--bank", str(BANK_FILE), "--vary", "stopping.se=0.3,0.35",
                         "--true-bank", str(BANK_FILE), "--examinees", "10", "--out", str(tmp_path / "tune")])
    assert refused.exit_code == 2 and "--true-bank" in refused.output and "multidimensional" in refused.output
    assert not (tmp_path / "tune").exists()
    bad = run(main, ["simulate", str(design_file), "--bank", str(BANK_FILE), "--theta", "grid:-1,1,3:2",
                     "--out", str(tmp_path / "bad")])
    assert bad.exit_code == 2 and "--theta" in bad.output


def test_correlated_abilities_have_the_correlation_asked_for():
    from adaptive_engine.simulation.population import draw_vectors, parse_ability_spec

    true = draw_vectors(parse_ability_spec("correlated_normal:0.5,2,0.6"), 20000, 1, 3)
    # sample moments against the multivariate normal asked for (numpy's corrcoef); 4 SE margins
    corr = np.corrcoef(true.T)
    assert np.all(np.abs(corr[np.triu_indices(3, 1)] - 0.6) < 4 * (1 - 0.36) / np.sqrt(20000))
    assert np.all(np.abs(true.mean(axis=0) - 0.5) < 4 * 2 / np.sqrt(20000))
