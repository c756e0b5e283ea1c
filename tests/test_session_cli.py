"""The ``adaptive-engine session`` commands, end to end, checked against published formulas.

The minimal design (simulations/minimal.toml) is run from start to result on the demo bank
item_banks/meridian_valley_operator.csv through the CLI.  Every item is checked against an
independent computation written here from the sources, reading the bank CSV with the
standard library:

* item information of the 3PL -- Lord (1980), *Applications of IRT to Practical Testing
  Problems*, eq. 10-4 -- and its 4PL generalisation -- Magis (2013), *Applied Psychological
  Measurement* 37(4), eq. 5:  I(theta) = D^2 a^2 (P - c)^2 (d - P)^2 / ((d - c)^2 P (1 - P));
  with c = 0, d = 1 it is the 2PL's D^2 a^2 P (1 - P);
* the EAP estimate and posterior SD by quadrature -- Bock & Mislevy (1982), *Applied
  Psychological Measurement* 6, 431-444 -- with a N(0, 1) prior; oracle for the final values:
  scipy.integrate.quad.
"""

from __future__ import annotations

import csv
import json
import math
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner
from scipy import integrate, stats

from adaptive_engine.cli import main
from adaptive_engine.live.store import open_store

ROOT = Path(__file__).resolve().parents[1]
MINIMAL = ROOT / "simulations" / "minimal.toml"
LICENSING = ROOT / "simulations" / "licensing_exam.toml"
BANK_CSV = ROOT / "item_banks" / "meridian_valley_operator.csv"
SESSION_COMMANDS = ["start", "answer", "show", "list", "try"]


# --------------------------------------------------------------------------------------
# independent formulas


def read_bank_rows():
    with open(BANK_CSV, newline="", encoding="utf-8") as fh:
        rows = list(csv.DictReader(fh))
    for r in rows:
        r["a"], r["b"] = float(r["a"]), float(r["b"])
        r["c"] = float(r["c"] or 0.0)
        r["d"] = float(r["d"] or 1.0)
        r["enemies"] = {g for g in r["enemy_group"].split(";") if g}
    return rows


def p_correct(item, theta, scaling=1.0):
    """4PL response function (Barton & Lord 1981; Magis 2013 eq. 1); D = 1 for a CSV bank."""
    return item["c"] + (item["d"] - item["c"]) / (1.0 + np.exp(-scaling * item["a"] * (theta - item["b"])))


def information(item, theta, scaling=1.0):
    """Lord (1980) eq. 10-4 / Magis (2013) eq. 5, written out here."""
    p = p_correct(item, theta, scaling)
    c, d = item["c"], item["d"]
    return (scaling * item["a"]) ** 2 * (p - c) ** 2 * (d - p) ** 2 / ((d - c) ** 2 * p * (1.0 - p))


def posterior_density(theta, answered):
    dens = stats.norm.pdf(theta)
    for item, x in answered:
        p = p_correct(item, theta)
        dens = dens * (p if x == 1 else 1.0 - p)
    return dens


def eap_fine_grid(answered):
    """EAP and posterior SD by quadrature on a fine grid (Bock & Mislevy 1982)."""
    grid = np.linspace(-8.0, 8.0, 4001)
    w = posterior_density(grid, answered)
    w = w / w.sum()
    mean = float(np.sum(w * grid))
    return mean, float(math.sqrt(np.sum(w * (grid - mean) ** 2)))


def eap_quad(answered):
    """The same integrals with scipy.integrate.quad as the oracle."""
    f = lambda t, k: t**k * posterior_density(t, answered)  # noqa: E731
    norm = integrate.quad(f, -12, 12, args=(0,), points=[0.0], limit=200)[0]
    mean = integrate.quad(f, -12, 12, args=(1,), points=[0.0], limit=200)[0] / norm
    second = integrate.quad(f, -12, 12, args=(2,), points=[0.0], limit=200)[0] / norm
    return mean, math.sqrt(second - mean**2)


def independent_next_item(rows, answered_ids, theta):
    """Information at theta of every operational item not yet given.

    The minimal design means plain maximum-information selection among the items not yet
    given (its blueprint keeps enemy groups and item sets off).
    """
    given = set(answered_ids)
    return {r["item_id"]: float(information(r, theta))
            for r in rows if r["status"] == "operational" and r["item_id"] not in given}


# --------------------------------------------------------------------------------------


#: the session commands whose result these tests read as JSON (--json; people get tables)
_JSON_COMMANDS = ("start", "answer", "show", "list")


def invoke(args, **kwargs):
    """Run the command line; session commands print JSON here (--json), as a program asks."""
    if args[:1] == ["session"] and args[1] in _JSON_COMMANDS and "--help" not in args:
        args = [*args, "--json"]
    result = CliRunner().invoke(main, args, catch_exceptions=False, **kwargs)
    return result


@pytest.mark.parametrize("command", SESSION_COMMANDS)
def test_every_session_command_has_help(command):
    result = invoke(["session", command, "--help"])
    assert result.exit_code == 0
    assert "Usage:" in result.output
    text = result.output.split("Options:")[0].replace("Usage:", "")
    assert len(text.split()) > 8, f"session {command} has no help text"


@pytest.mark.parametrize("true_theta,answer_seed", [(-1.2, 1), (0.3, 2), (1.8, 3)])
def test_minimal_design_through_the_cli_matches_independent_eap_and_information(tmp_path, true_theta, answer_seed):
    rows = read_bank_rows()
    by_id = {r["item_id"]: r for r in rows}
    db = str(tmp_path / "s.db")
    out = invoke(["session", "start", "--db", db, "--design", str(MINIMAL), "--bank", str(BANK_CSV),
                  "--examinee", "candidate-1", "--seed", "5"])
    assert out.exit_code == 0, out.output
    reply = json.loads(out.output)
    assert set(reply) >= {"session_id", "item_id", "done"} and reply["done"] is False
    sid = reply["session_id"]
    rng = np.random.default_rng(answer_seed)
    answered = []  # (bank row dict, response)
    max_items, min_items, se_target = 15, 5, 0.3  # minimal.toml
    theta = 0.0  # [opening] theta
    while True:
        iid = reply["item_id"]
        ids = [r["item_id"] for r, _ in answered]
        found = independent_next_item(rows, ids, theta)
        best = max(found.values())
        # the picked item is the maximum-information item at the independent EAP
        # (ties within 1e-9 allowed: the two EAPs differ by quadrature error only)
        assert iid in found, f"{iid} was given before or is not operational"
        assert found[iid] >= best - 1e-9, (iid, found[iid], best)
        x = int(rng.random() < p_correct(by_id[iid], true_theta))
        answered.append((by_id[iid], x))
        out = invoke(["session", "answer", sid, iid, str(x), "--db", db])
        assert out.exit_code == 0, out.output
        reply = json.loads(out.output)
        theta, sd = eap_fine_grid(answered)
        assert reply["theta"] == pytest.approx(theta, abs=1e-3)
        assert reply["se"] == pytest.approx(sd, abs=1e-3)
        n = len(answered)
        should_stop = n >= max_items or (n >= min_items and sd <= se_target)
        if abs(sd - se_target) > 1e-4:
            assert reply["done"] == should_stop, (n, sd)
        if reply["done"]:
            break
    assert reply["item_id"] is None
    quad_theta, quad_se = eap_quad(answered)
    result = reply["result"]
    assert result["theta"] == pytest.approx(quad_theta, abs=1e-3)
    assert result["se"] == pytest.approx(quad_se, abs=1e-3)
    assert result["items"]["scored"] == len(answered)
    shown = json.loads(invoke(["session", "show", sid, "--db", db]).output)
    assert shown["status"] == "finished"
    assert [a["item_id"] for a in shown["administered"]] == [r["item_id"] for r, _ in answered]
    assert [a["response"] for a in shown["administered"]] == [x for _, x in answered]
    assert shown["result"]["theta"] == result["theta"]
    listed = json.loads(invoke(["session", "list", "--db", db, "--status", "finished"]).output)
    assert [s["session_id"] for s in listed] == [sid]
    assert json.loads(invoke(["session", "list", "--db", db, "--status", "active"]).output) == []


def _start(db, seed=1):
    out = invoke(["session", "start", "--db", db, "--design", str(LICENSING), "--bank", str(BANK_CSV),
                  "--seed", str(seed)])
    assert out.exit_code == 0, out.output
    return json.loads(out.output)


@pytest.mark.parametrize("args,message", [
    (lambda sid, iid: [sid, iid, "x"], "integer"),
    (lambda sid, iid: [sid, iid, "2"], "outside the categories"),
    (lambda sid, iid: [sid, iid, "1.0"], "integer"),
    (lambda sid, iid: ["no-such", iid, "1"], "unknown session"),
    (lambda sid, iid: [sid, "MV-SRC-001" if iid != "MV-SRC-001" else "MV-SRC-002", "1"], "not the pending item"),
])
def test_cli_refusals_exit_2_and_change_nothing(tmp_path, args, message):
    db = str(tmp_path / "s.db")
    reply = _start(db)
    with open_store(db) as store:
        before = store.dump()
    out = CliRunner().invoke(main, ["session", "answer", *args(reply["session_id"], reply["item_id"]), "--db", db])
    assert out.exit_code == 2
    assert message in out.output
    assert "Traceback" not in out.output
    with open_store(db) as store:
        assert store.dump() == before


def test_cli_errors_for_missing_files_and_store(tmp_path):
    out = CliRunner().invoke(main, ["session", "show", "abc", "--db", str(tmp_path / "none.db")])
    assert out.exit_code == 2 and "no session store" in out.output
    assert not (tmp_path / "none.db").exists()
    out = CliRunner().invoke(main, ["session", "start", "--db", str(tmp_path / "s.db"),
                                    "--design", str(tmp_path / "missing.toml"), "--bank", str(BANK_CSV)])
    assert out.exit_code == 2 and "missing.toml" in out.output
    not_a_db = tmp_path / "text.db"
    not_a_db.write_text("this is not a database\n" * 50)
    out = CliRunner().invoke(main, ["session", "list", "--db", str(not_a_db)])
    assert out.exit_code == 2 and "session store" in out.output


def test_cli_idempotent_resend(tmp_path):
    db = str(tmp_path / "s.db")
    reply = _start(db, seed=8)
    args = ["session", "answer", reply["session_id"], reply["item_id"], "1", "--db", db, "--elapsed", "20"]
    first = invoke(args)
    with open_store(db) as store:
        before = store.dump()
    second = invoke(args)
    assert first.exit_code == second.exit_code == 0
    assert first.output == second.output
    with open_store(db) as store:
        assert store.dump() == before


def test_try_takes_the_test_in_the_terminal():
    # 40 answers are more than any test of the minimal design needs; a bad answer first
    typed = "7\nmaybe\n" + "1\n0\n" * 20
    out = CliRunner().invoke(main, ["session", "try", "--design", str(MINIMAL), "--bank", str(BANK_CSV),
                                    "--seed", "3", "--json"], input=typed)
    assert out.exit_code == 0, out.output
    assert "refused" in out.output and "outside the categories 0..1" in out.output
    assert "must be an integer" in out.output
    report = json.loads(out.output.strip().splitlines()[-1])
    assert report["items"]["scored"] >= 5 and report["se"] is not None
    assert "MV-" in out.output and "[" in out.output  # item id and area shown


def test_try_ends_with_exit_2_when_input_runs_out():
    result = CliRunner().invoke(main, ["session", "try", "--design", str(MINIMAL), "--bank", str(BANK_CSV)],
                                input="1\n0\n")
    assert result.exit_code == 2
    assert "input ended before the test finished" in result.output


def test_a_refused_start_leaves_no_store_behind(tmp_path):
    db = tmp_path / "new.db"
    result = invoke(["session", "start", "--db", str(db), "--design", str(MINIMAL), "--bank", str(BANK_CSV),
                     "--prior-sd", "0"])
    assert result.exit_code == 2
    assert not db.exists()


# --------------------------------------------------------------------------------------
# hostile command lines: exit 2 and one `LOCATION: problem` line, never a traceback


def _refused(args, *, where, message):
    """Run with exceptions caught (a raw error would give exit 1) and check the refusal."""
    out = CliRunner().invoke(main, args)
    assert out.exit_code == 2, (out.exit_code, out.output, out.exception)
    assert "Traceback" not in out.output
    lines = [line.strip() for line in out.output.splitlines() if line.strip() and line.strip() != "error:"]
    assert len(lines) == 1, out.output
    assert lines[0].startswith(f"{where}: ") and message in lines[0], lines[0]
    return lines[0]


# what click hands a command for invalid UTF-8 bytes in argv on POSIX (surrogate escapes)
NOT_UTF8 = "MV-\udcff\udcfe"


def test_invalid_utf8_in_session_ids_item_ids_and_examinee(tmp_path):
    db = str(tmp_path / "s.db")
    reply = _start(db)
    sid, iid = reply["session_id"], reply["item_id"]
    with open_store(db) as store:
        before = store.dump()
    _refused(["session", "answer", NOT_UTF8, iid, "1", "--db", db], where="SESSION_ID", message="not valid text")
    _refused(["session", "answer", sid, NOT_UTF8, "1", "--db", db], where="ITEM_ID", message="not valid text")
    _refused(["session", "show", NOT_UTF8, "--db", db], where="SESSION_ID", message="not valid text")
    _refused(["session", "start", "--db", db, "--design", str(LICENSING), "--bank", str(BANK_CSV),
              "--examinee", NOT_UTF8], where="--examinee", message="not valid text")
    with open_store(db) as store:
        assert store.dump() == before


def test_invalid_utf8_bytes_in_a_real_command_line(tmp_path):
    """The same through a real process: bytes in argv, decoded by Python itself."""
    import os
    import subprocess
    import sys

    db = str(tmp_path / "s.db")
    reply = _start(db)
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    base = [sys.executable, "-m", "adaptive_engine", "session"]
    for args, where in [
        ([b"answer", reply["session_id"].encode(), b"MV-\xff\xfe", b"1", b"--db", db.encode()], "ITEM_ID"),
        ([b"start", b"--db", db.encode(), b"--design", bytes(LICENSING), b"--bank", bytes(BANK_CSV),
          b"--examinee", b"cand\xc3\x28idate"], "--examinee"),
    ]:
        run = subprocess.run(base + args, env=env, capture_output=True, timeout=120)
        err = run.stderr.decode("utf-8")
        assert run.returncode == 2, err
        assert "Traceback" not in err
        assert err.startswith(f"{where}: ") and "not valid text" in err, err


@pytest.mark.parametrize("response,message", [
    ("9" * 5000, "outside the categories 0..1"),
    ("-1", "outside the categories 0..1"),
    ("-" + "9" * 5000, "outside the categories 0..1"),
    ("\u0661", "ASCII digits"),
    ("\uff11", "ASCII digits"),
], ids=["5000 digits", "minus one", "minus 5000 digits", "arabic-indic one", "fullwidth one"])
def test_hostile_responses_on_the_command_line(tmp_path, response, message):
    db = str(tmp_path / "s.db")
    reply = _start(db)
    with open_store(db) as store:
        before = store.dump()
    sid, iid = reply["session_id"], reply["item_id"]
    line = _refused(["session", "answer", sid, iid, response, "--db", db],
                    where=f"session {sid} item {iid}", message=message)
    assert len(line) < 300
    with open_store(db) as store:
        assert store.dump() == before


def test_negative_response_before_the_options_is_a_value_not_an_option(tmp_path):
    db = str(tmp_path / "s.db")
    reply = _start(db)
    out = CliRunner().invoke(main, ["session", "answer", reply["session_id"], reply["item_id"], "-1", "--db", db])
    assert out.exit_code == 2 and "outside the categories 0..1" in out.output, out.output
    assert "No such option" not in out.output


@pytest.mark.parametrize("flag,value", [
    ("--prior-mean", "1e300"), ("--prior-mean", "-1e400"), ("--prior-mean", "nan"), ("--prior-mean", "7"),
    ("--prior-sd", "1e300"), ("--prior-sd", "0.001"), ("--prior-sd", "0"),
])
def test_absurd_priors_on_the_command_line_name_the_flag_and_create_no_store(tmp_path, flag, value):
    db = tmp_path / "new.db"
    _refused(["session", "start", "--db", str(db), "--design", str(LICENSING), "--bank", str(BANK_CSV),
              flag, value], where=flag, message="")
    assert not db.exists() and not Path(str(db) + "-wal").exists()


def test_session_show_prints_the_seed_only_when_asked(tmp_path):
    db = str(tmp_path / "s.db")
    sid = _start(db, seed=987654)["session_id"]
    plain = invoke(["session", "show", sid, "--db", db])
    assert plain.exit_code == 0 and "seed" not in json.loads(plain.output) and "987654" not in plain.output
    # the prior the session started from: the design's N(0, 1) (simulations/licensing_exam.toml)
    assert json.loads(plain.output)["prior"] == {"mean": 0.0, "sd": 1.0}
    with_seed = invoke(["session", "show", sid, "--db", db, "--with-seed"])
    assert json.loads(with_seed.output)["seed"] == 987654


def test_a_store_made_by_session_start_is_owner_only(tmp_path):
    import os
    import stat

    old = os.umask(0o022)
    try:
        db = tmp_path / "fresh.db"
        _start(str(db))
        assert stat.S_IMODE(db.stat().st_mode) == 0o600
    finally:
        os.umask(old)


def test_number_options_take_ascii_digits_only(tmp_path):
    # float() reads '١' (Arabic-Indic one) and '１２' (fullwidth twelve) as numbers
    db = tmp_path / "new.db"
    out = CliRunner().invoke(main, ["session", "start", "--db", str(db), "--design", str(LICENSING),
                                    "--bank", str(BANK_CSV), "--prior-mean", "\u0661"])
    assert out.exit_code == 2 and "ASCII digits" in out.output and "--prior-mean" in out.output, out.output
    assert not db.exists()
    reply = _start(str(db))
    out = CliRunner().invoke(main, ["session", "answer", reply["session_id"], reply["item_id"], "1",
                                    "--db", str(db), "--elapsed", "\uff11\uff12"])
    assert out.exit_code == 2 and "ASCII digits" in out.output, out.output
