"""The simulation driver, ability specifications, study files and the CLI commands."""

from __future__ import annotations

import csv
import io
import json
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner
from scipy import stats

from adaptive_engine.bank import bank_from_records
from adaptive_engine.cli import main
from adaptive_engine.design import Design, Exposure, Stopping
from adaptive_engine.errors import AdaptiveEngineError
from adaptive_engine.simulation import engine as simulation
from adaptive_engine.simulation import metrics
from adaptive_engine.simulation import population as examinees

ROOT = Path(__file__).resolve().parents[1]


def small_bank(n=80, seed=0):
    """Test input only: random 2PL/3PL items in plausible ranges."""
    rng = np.random.default_rng(seed)
    recs = []
    for i in range(n):
        rec = dict(item_id=f"t{i:03d}", model="3PL" if i % 2 else "2PL", a=float(rng.uniform(0.7, 2.0)),
                   b=float(rng.normal(0, 1.2)), area=("one", "two")[i % 2])
        if i % 2:
            rec["c"] = float(rng.uniform(0.05, 0.2))
        recs.append(rec)
    return bank_from_records(recs, name="small")


DESIGN = Design(exposure=Exposure(method="randomesque", candidates=4),
                stopping=Stopping(min_items=5, max_items=12, se=0.4))


def _same(a, b):
    for name in ("seeds", "true_theta", "theta", "se", "n_scored", "stop_reason", "administered", "offered"):
        x, y = getattr(a, name), getattr(b, name)
        assert np.array_equal(x, y, equal_nan=x.dtype.kind == "f"), name


def test_results_do_not_depend_on_chunking_or_executor():
    bank = small_bank()
    theta = examinees.parse_ability_spec("normal:0,1").draw(90, 3)
    one = simulation.simulate(DESIGN, bank, true_theta=theta, seed=3, chunk_size=90)
    _same(one, simulation.simulate(DESIGN, bank, true_theta=theta, seed=3, chunk_size=17))
    with ThreadPoolExecutor(2) as pool:  # any executor with submit() serves
        _same(one, simulation.simulate(DESIGN, bank, true_theta=theta, seed=3, chunk_size=25, executor=pool))
    _same(one, simulation.simulate(DESIGN, bank, true_theta=theta, seed=3, chunk_size=30, workers=2))
    other = simulation.simulate(DESIGN, bank, true_theta=theta, seed=4, chunk_size=90)
    assert not np.array_equal(one.theta, other.theta)


def test_workers_split_a_run_at_the_default_chunk_size():
    # ceil(N / (2 workers)) examinees per chunk: 90 examinees, 2 workers -> chunks of 23
    assert simulation.effective_chunk_size(90, simulation.DEFAULT_CHUNK, 2) == 23
    assert simulation.effective_chunk_size(90, 10, 2) == 10  # a smaller chunk size is kept
    assert simulation.effective_chunk_size(90, simulation.DEFAULT_CHUNK, 1) == simulation.DEFAULT_CHUNK
    bank = small_bank()
    theta = examinees.parse_ability_spec("normal:0,1").draw(90, 3)
    one = simulation.simulate(DESIGN, bank, true_theta=theta, seed=3)
    sizes = []
    with ThreadPoolExecutor(2) as pool:
        split = simulation.simulate(DESIGN, bank, true_theta=theta, seed=3, executor=pool, workers=2,
                                    on_chunk=lambda c: sizes.append(c.size))
    assert sizes == [23, 23, 23, 21]
    _same(one, split)
    with pytest.raises(simulation.SimulationError, match="chunk_size") as info:
        simulation.simulate(DESIGN, bank, true_theta=theta, seed=3, chunk_size=0)
    assert info.value.location == "chunk_size"


def test_examinee_i_is_the_same_in_a_longer_run():
    bank = small_bank()
    theta = np.linspace(-2, 2, 40)
    short = simulation.simulate(DESIGN, bank, true_theta=theta[:15], seed=8)
    long = simulation.simulate(DESIGN, bank, true_theta=theta, seed=8, chunk_size=7)
    assert np.array_equal(short.theta, long.theta[:15])


def test_dask_executor_path():
    # a real cluster of 2 worker processes: the design, banks and chunk results cross
    # process boundaries by pickling, as on a multi-machine cluster
    distributed = pytest.importorskip("dask.distributed",
                                      reason="dask.distributed is not installed (the 'cluster' extra)")
    bank = small_bank()
    theta = np.linspace(-2, 2, 30)
    local = simulation.simulate(DESIGN, bank, true_theta=theta, seed=2, chunk_size=10)
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                  dashboard_address=None) as cluster, distributed.Client(cluster) as client:
        sizes = []
        remote = simulation.simulate(DESIGN, bank, true_theta=theta, seed=2, workers=2,
                                     executor=client.get_executor(), on_chunk=lambda c: sizes.append(c.size))
        assert len(client.scheduler_info()["workers"]) == 2
    _same(local, remote)
    assert sizes == [8, 8, 8, 6]  # workers=2 cuts 30 examinees into chunks of ceil(30 / 4)


def test_answers_follow_the_true_model():
    """Fixed one-item tests at a known theta: the share correct matches P(theta).

    Oracle: scipy.stats.binomtest on the count of correct answers.
    """
    bank = bank_from_records([dict(item_id="only", model="3PL", a=1.3, b=0.4, c=0.2)])
    design = Design(stopping=Stopping(min_items=1, max_items=1))
    theta = np.full(4000, 0.9)
    chunk = simulation.run_chunk(simulation.build_context(design, bank), seed=1, start=0, true_theta=theta)
    p = 0.2 + 0.8 / (1 + np.exp(-1.3 * (0.9 - 0.4)))
    assert stats.binomtest(int(chunk.responses[:, 0].sum()), 4000, p).pvalue > 0.001


def test_true_bank_differs_from_operational():
    bank = small_bank()
    theta = np.linspace(-2, 2, 60)
    shifted = bank.evolve(b=bank.b + 1.0)  # items are truly harder than the bank says
    res = simulation.simulate(DESIGN, bank, true_theta=theta, seed=5, true_bank=shifted)
    base = simulation.simulate(DESIGN, bank, true_theta=theta, seed=5)
    assert metrics.precision(res.true_theta, res.theta, res.se)["bias"] < \
        metrics.precision(base.true_theta, base.theta, base.se)["bias"] - 0.5
    missing = bank.subset(np.arange(10))
    with pytest.raises(simulation.SimulationError, match="missing from the true bank"):
        simulation.simulate(DESIGN, bank, true_theta=theta, seed=5, true_bank=missing)


def test_perturbed_bank_keeps_parameters_valid():
    bank = small_bank()
    p = simulation.perturbed_bank(bank, sd_a=0.5, sd_b=0.3, sd_c=0.2, seed=2)
    assert np.all(p.a > 0) and np.all((p.c >= 0) & (p.c < p.d))
    assert np.all(p.c[np.asarray(bank.model) == "2PL"] == bank.c[np.asarray(bank.model) == "2PL"])
    assert np.std(p.b - bank.b) == pytest.approx(0.3, rel=0.3)
    with pytest.raises(AdaptiveEngineError):
        simulation.perturbed_bank(bank, sd_a=-1)


def test_perturbed_bank_by_each_items_own_standard_error():
    # oracle: scipy.stats.kstest -- the b shifts divided by each item's own SD are standard
    # normal, and items with SD 0 do not move
    bank = small_bank(n=400, seed=3)
    sd_b = np.where(np.arange(400) % 4 == 0, 0.0, np.linspace(0.05, 0.6, 400))
    p = simulation.perturbed_bank(bank, sd_b=sd_b, seed=4)
    moved = sd_b > 0
    assert np.array_equal(p.b[~moved], bank.b[~moved]) and np.array_equal(p.a, bank.a)
    assert stats.kstest((p.b[moved] - bank.b[moved]) / sd_b[moved], "norm").pvalue > 0.001
    # a scalar SD draws exactly what an array of that SD draws
    same = simulation.perturbed_bank(bank, sd_b=np.full(400, 0.2), seed=4)
    assert np.array_equal(same.b, simulation.perturbed_bank(bank, sd_b=0.2, seed=4).b)
    with pytest.raises(simulation.SimulationError, match="sd_b"):
        simulation.perturbed_bank(bank, sd_b=np.full(3, 0.1))


def _fit_report(tmp_path, bank, ses, extra_rows=""):
    """A fit report written by the calibration's own writer (item_fit.item_report_rows)."""
    from types import SimpleNamespace

    from adaptive_engine.calibration.item_fit import item_report_rows, rows_to_csv

    result = SimpleNamespace(bank=bank, standard_errors=ses,
                             data=SimpleNamespace(item=np.arange(bank.n_items)))
    path = tmp_path / "fit_report.csv"
    path.write_text(rows_to_csv(item_report_rows(result)) + extra_rows)
    return path


def test_read_standard_errors_from_a_fit_report(tmp_path):
    from adaptive_engine.simulation.study import read_standard_errors

    bank = small_bank(n=6)
    nan = np.full(6, np.nan)
    is3 = np.asarray(bank.model) == "3PL"
    ses = {"a": np.linspace(0.1, 0.2, 6), "b": np.linspace(0.3, 0.5, 6), "c": np.where(is3, 0.04, np.nan),
           "d": nan, "thresholds": np.zeros((6, 0))}
    got = read_standard_errors(_fit_report(tmp_path, bank, ses), bank)
    assert got["sd_a"] == pytest.approx(ses["a"]) and got["sd_b"] == pytest.approx(ses["b"])
    assert np.array_equal(got["sd_c"], np.where(is3, 0.04, 0.0))  # not estimated: unperturbed
    assert not got["sd_d"].any()
    p = simulation.perturbed_bank(bank, seed=1, **got)
    assert np.array_equal(p.c[~is3], bank.c[~is3]) and not np.array_equal(p.c[is3], bank.c[is3])


@pytest.mark.parametrize("extra, where", [
    ("zz9,2PL,10,1,0.1,0,0.1,,,,", "fit_report.csv line 7, item zz9"),
    ("t005,3PL,10,1,-0.1,0,0.1,,,,", "fit_report.csv line 7, item t005, se_a"),
    ("t005,3PL,10,1,abc,0,0.1,,,,", "fit_report.csv line 7, item t005, se_a"),
    ("t005,3PL,10,1,0.1,0,inf,,,,", "fit_report.csv line 7, item t005, se_b"),
    ("t001,3PL,10,1,0.1,0,0.1,,,,", "fit_report.csv line 7, item t001"),  # listed twice
])
def test_perturb_from_errors_are_located(tmp_path, extra, where):
    from adaptive_engine.simulation.study import read_standard_errors

    bank = small_bank(n=6)
    ses = {k: np.full(5, 0.1) for k in "abcd"} | {"thresholds": np.zeros((5, 0))}
    report = _fit_report(tmp_path, bank.subset(np.arange(5)), ses, extra + "\n")  # lines 2-6: t000-t004
    with pytest.raises(simulation.SimulationError) as err:
        read_standard_errors(report, bank)
    assert where in str(err.value)


def test_simulate_cli_perturb_from(tmp_path):
    from adaptive_engine.bank import load_bank

    design, bank_path = _shipped()
    bank = load_bank(bank_path)
    n = bank.n_items
    ses = {"a": np.full(n, 0.3), "b": np.full(n, 0.4), "c": np.full(n, np.nan), "d": np.full(n, np.nan),
           "thresholds": np.zeros((n, 0))}
    report = _fit_report(tmp_path, bank, ses)
    args = ["simulate", design, "--bank", bank_path, "--examinees", "80", "--seed", "2", "--json"]
    plain = CliRunner().invoke(main, [*args, "--out", str(tmp_path / "a")])
    moved = CliRunner().invoke(main, [*args, "--out", str(tmp_path / "b"), "--perturb-from", str(report)])
    assert plain.exit_code == 0 and moved.exit_code == 0, moved.output
    assert json.loads(plain.stdout)["rmse"] != json.loads(moved.stdout)["rmse"]
    bad = tmp_path / "bad.csv"
    bad.write_text("item_id,se_a\nMV-NOPE,0.1\n")
    r = CliRunner().invoke(main, [*args, "--out", str(tmp_path / "c"), "--perturb-from", str(bad)])
    assert r.exit_code == 2 and "bad.csv line 2, item MV-NOPE" in r.output
    r = CliRunner().invoke(main, [*args, "--out", str(tmp_path / "c"), "--perturb-from", str(report),
                                  "--perturb", "a=0.1"])
    assert r.exit_code == 2 and "--perturb-from" in r.output


@pytest.mark.parametrize("text, n", [("normal:0,1", None), ("uniform:-2,2", None), ("grid:-2,2,5:3", 15)])
def test_ability_specs(text, n):
    spec = examinees.parse_ability_spec(text)
    assert spec.fixed_count == n
    draw = spec.draw(15, 1)
    assert draw.shape == (15,) and np.all(np.isfinite(draw))
    assert np.array_equal(draw, spec.draw(15, 1))
    if text.startswith("grid"):
        assert np.array_equal(draw, np.repeat([-2, -1, 0, 1, 2], 3))


def test_normal_spec_moments():
    # oracle: scipy.stats.kstest against the normal(0.5, 2) distribution
    draw = examinees.parse_ability_spec("normal:0.5,2").draw(3000, 9)
    assert stats.kstest(draw, "norm", args=(0.5, 2)).pvalue > 0.001


def test_ability_file(tmp_path):
    f = tmp_path / "abilities.csv"
    f.write_text("person,theta\na,0.5\nb,-1\n\nc,2\n")
    spec = examinees.parse_ability_spec(f"file:{f}")
    assert spec.fixed_count == 3
    assert list(spec.draw(3, 0)) == [0.5, -1.0, 2.0]
    f.write_text("theta\n0.5\nabc\n")
    with pytest.raises(examinees.AbilitySpecError, match="line 3"):
        examinees.parse_ability_spec(f"file:{f}")


@pytest.mark.parametrize("bad", ["normal:0", "gauss:0,1", "uniform:2,1", "grid:-2,2,5", "normal:0,-1",
                                 "normal:x,1", "file:/nonexistent/abilities.csv"])
def test_bad_ability_specs(bad):
    with pytest.raises(examinees.AbilitySpecError):
        examinees.parse_ability_spec(bad)


# -- files and CLI -----------------------------------------------------------------------

def _shipped():
    design = ROOT / "simulations" / "minimal.toml"
    bank = ROOT / "item_banks" / "meridian_valley_operator.csv"
    if not design.exists() or not bank.exists():
        pytest.skip("shipped demo files missing")
    return str(design), str(bank)


def test_the_report_embeds_its_figures(tmp_path):
    design, bank = _shipped()
    out = tmp_path / "study"
    result = CliRunner().invoke(main, ["simulate", design, "--bank", bank, "--examinees", "30", "--seed", "4",
                                       "--out", str(out), "--no-administrations"])
    assert result.exit_code == 0, result.output
    body = (out / "report.html").read_text().split("<body>")[1]
    # length (distribution, by ability), precision, exposure, bank information: inline, each captioned
    assert body.count("<figure><svg ") == body.count("<figcaption>") >= 5
    assert "<img" not in body and "left out" not in body


def test_simulate_cli_writes_every_file(tmp_path):
    design, bank = _shipped()
    out = tmp_path / "study"
    result = CliRunner().invoke(main, ["simulate", design, "--bank", bank, "--examinees", "150", "--seed", "4",
                                       "--out", str(out), "--theta", "uniform:-2,2", "--exposure-target", "0.3"])
    assert result.exit_code == 0, result.output
    for name in ("summary.json", "examinees.csv", "administrations.csv", "items.csv", "conditional.csv",
                 "report.html"):
        assert (out / name).exists(), name
    summary = json.loads((out / "summary.json").read_text())
    for key in ("rmse", "bias", "mean_se", "mean_length", "max_exposure", "overlap_rate", "chi_square_index"):
        assert summary[key] is not None, key
    people = list(csv.DictReader((out / "examinees.csv").open()))
    admin = list(csv.DictReader((out / "administrations.csv").open()))
    assert len(people) == 150
    assert sum(int(p["n_scored"]) + int(p["n_pretest"]) for p in people) == len(admin)
    # figures in summary.json agree with examinees.csv
    err = np.array([float(p["theta"]) - float(p["true_theta"]) for p in people])
    assert summary["rmse"] == pytest.approx(np.sqrt(np.mean(err**2)), abs=1e-5)
    assert summary["mean_length"] == pytest.approx(np.mean([int(p["n_scored"]) for p in people]))
    # administrations are in order per examinee and the last interim estimate is present
    first = [a for a in admin if a["examinee"] == "0"]
    assert [int(a["position"]) for a in first] == list(range(1, len(first) + 1))
    html = (out / "report.html").read_text()
    assert "http" not in html.split("<body>")[1]  # self-contained
    items = list(csv.DictReader((out / "items.csv").open()))
    assert max(float(i["exposure_rate"]) for i in items) == pytest.approx(summary["max_exposure"], abs=1e-6)
    assert not [p for p in out.iterdir() if p.name.startswith(".")]  # no staging left
    assert summary["exposure_target"] == 0.3
    rates = np.array([float(i["exposure_rate"]) for i in items if i["status"] == "operational"])
    assert summary["share_above_target"] == pytest.approx(np.mean(rates > 0.3), abs=1e-9)


def test_rerun_into_the_same_folder_leaves_no_stale_files(tmp_path):
    design, bank = _shipped()
    out = tmp_path / "study"
    args = ["simulate", design, "--bank", bank, "--out", str(out)]
    assert CliRunner().invoke(main, [*args, "--examinees", "30"]).exit_code == 0
    assert (out / "administrations.csv").exists()
    (out / "notes.txt").write_text("kept")  # not a file of the study: left alone
    r = CliRunner().invoke(main, [*args, "--examinees", "20", "--no-administrations"])
    assert r.exit_code == 0, r.output
    assert not (out / "administrations.csv").exists()
    assert len(list(csv.DictReader((out / "examinees.csv").open()))) == 20
    assert (out / "notes.txt").read_text() == "kept"
    # a failed rerun leaves the earlier study as it was
    before = (out / "summary.json").read_text()
    r = CliRunner().invoke(main, [*args, "--examinees", "20", "--perturb", "a=-1"])
    assert r.exit_code == 2 and (out / "summary.json").read_text() == before


def test_simulate_cli_share_above_default_target(tmp_path):
    design, bank = _shipped()
    out = tmp_path / "study"
    r = CliRunner().invoke(main, ["simulate", design, "--bank", bank, "--examinees", "60", "--out", str(out)])
    assert r.exit_code == 0, r.output
    summary = json.loads((out / "summary.json").read_text())
    assert summary["exposure_target"] == 0.25 and summary["share_above_target"] is not None
    assert "share_above_target" in r.output
    r = CliRunner().invoke(main, ["simulate", design, "--bank", bank, "--examinees", "60",
                                  "--out", str(tmp_path / "bad"), "--exposure-target", "-1"])
    assert r.exit_code == 2 and "--exposure-target" in r.output
    assert not (tmp_path / "bad").exists()


def test_simulate_cli_errors_exit_2_and_write_nothing(tmp_path):
    design, bank = _shipped()
    out = tmp_path / "study"
    runner = CliRunner()
    r = runner.invoke(main, ["simulate", design, "--bank", bank, "--out", str(out), "--theta", "normal:0"])
    assert r.exit_code == 2 and "--theta" in r.output
    assert not out.exists() or not any(out.iterdir())
    r = runner.invoke(main, ["simulate", design, "--bank", bank, "--out", str(out), "--perturb", "q=1"])
    assert r.exit_code == 2 and "--perturb" in r.output
    # locations name the options, not internal names
    r = runner.invoke(main, ["simulate", design, "--bank", bank, "--out", str(out), "--perturb", "a=-0.1"])
    assert r.exit_code == 2 and "--perturb a:" in r.output
    r = runner.invoke(main, ["simulate", design, "--bank", bank, "--out", str(out), "--chunk-size", "0"])
    assert r.exit_code == 2 and "--chunk-size:" in r.output
    bad_design = tmp_path / "bad.toml"
    bad_design.write_text("[stopping]\nmax_items = 0\n")
    r = runner.invoke(main, ["simulate", str(bad_design), "--bank", bank, "--out", str(out)])
    assert r.exit_code == 2 and "max_items" in r.output
    assert not out.exists() or not any(out.iterdir())


def test_sizes_given_by_the_user_are_bounded_before_anything_is_allocated(tmp_path):
    # --examinees 100000000000 ended in a raw MemoryError
    design, bank = _shipped()
    out = tmp_path / "study"
    runner = CliRunner()
    for args, where in [(["--examinees", "100000000000"], "--examinees: at most 1,000,000 examinees"),
                        (["--theta", "grid:-3,3,1e12:1"], "--theta: the grid 'grid:-3,3,1e12:1' asks for 1e+12"),
                        (["--theta", "grid:-3,3,2000:1000"], "(POINTS x PER_POINT); at most 1,000,000")]:
        r = runner.invoke(main, ["simulate", design, "--bank", bank, "--out", str(out), *args])
        assert r.exit_code == 2 and where in r.output, r.output
        assert not out.exists()
    spec = examinees.parse_ability_spec("normal:0,1")
    with pytest.raises(examinees.AbilitySpecError, match="at most 1,000,000"):
        examinees.examinee_count(spec, examinees.MAX_EXAMINEES + 1, default=10)
    with pytest.raises(examinees.AbilitySpecError, match="at most 1,000,000"):
        spec.draw(10**11, seed=1)
    assert examinees.examinee_count(spec, examinees.MAX_EXAMINEES, default=10) == examinees.MAX_EXAMINEES


def test_worker_counts_and_strata_are_bounded(tmp_path):
    design, bank = _shipped()
    runner = CliRunner()
    r = runner.invoke(main, ["simulate", design, "--bank", bank, "--out", str(tmp_path / "s"), "--workers", "100000"])
    assert r.exit_code == 2 and "--workers: at most 64 worker processes" in r.output
    r = runner.invoke(main, ["tune", design, "--bank", bank, "--vary", "stopping.se=0.3,0.5", "--out",
                             str(tmp_path / "t"), "--workers", "65"])
    assert r.exit_code == 2 and "--workers:" in r.output
    cuts = ",".join(str(c) for c in range(-10, 20))
    r = runner.invoke(main, ["exposure", "calibrate", design, "--bank", bank, "--target", "0.3", "--out",
                             str(tmp_path / "p.csv"), f"--conditional-strata={cuts}"])
    assert r.exit_code == 2 and "--conditional-strata: 30 cut points make 31 ability strata; at most 20" in r.output
    assert not (tmp_path / "p.csv").exists()


def test_ability_files_must_be_regular_files(tmp_path):
    import os

    os.mkfifo(tmp_path / "pipe.csv")
    for target, fragment in [(tmp_path / "pipe.csv", "not a regular file"), ("/dev/zero", "not a regular file")]:
        with pytest.raises(examinees.AbilitySpecError, match=fragment):
            examinees.parse_ability_spec(f"file:{target}")
    with_bom = tmp_path / "bom.csv"
    with_bom.write_bytes(b"\xef\xbb\xbftheta\n0.5\n-1\n")
    assert examinees.parse_ability_spec(f"file:{with_bom}").thetas == (0.5, -1.0)


def test_tune_cli(tmp_path):
    design, bank = _shipped()
    out = tmp_path / "tune"
    r = CliRunner().invoke(main, ["tune", design, "--bank", bank, "--vary", "stopping.se=0.3,0.5",
                                  "--vary", "stopping.max_items=10,15", "--examinees", "120", "--out", str(out)])
    assert r.exit_code == 0, r.output
    rows = json.loads((out / "tuning.json").read_text())["rows"]
    assert len(rows) == 4
    by = {(x["stopping.se"], x["stopping.max_items"]): x for x in rows}
    # common random numbers: a looser SE target never lengthens the test of the same examinees
    assert by[(0.5, 15)]["mean_length"] <= by[(0.3, 15)]["mean_length"]
    assert any(x["frontier"] for x in rows)
    r = CliRunner().invoke(main, ["tune", design, "--bank", bank, "--vary", "stopping.nonsense=1,2",
                                  "--out", str(tmp_path / "t2")])
    assert r.exit_code == 2 and "nonsense" in r.output


def test_tuning_report_embeds_its_plots():
    from adaptive_engine.simulation.html_report import tuning_report_html
    from adaptive_engine.simulation.tuning import tradeoff_figures

    rows = [{"stopping.se": 0.3, "mean_length": 10.0, "rmse": 0.3, "frontier": True}]
    page = tuning_report_html(rows, tradeoff_figures(rows, ["stopping.se"]), title="t")
    assert page.count("<figure><svg ") == 1 and "Mean test length against RMSE" in page
    assert "<figure>" not in tuning_report_html(rows, [], title="t")


def test_efficient_frontier():
    from adaptive_engine.simulation.tuning import efficient_frontier

    front = efficient_frontier([10, 20, 20, 30], [0.5, 0.3, 0.4, 0.3], [0.9, 0.9, 0.9, 0.95])
    assert front.tolist() == [True, True, False, True]


def test_every_simulation_command_has_help():
    runner = CliRunner()
    for path in (["simulate"], ["tune"], ["exposure"], ["exposure", "calibrate"], ["demo"]):
        r = runner.invoke(main, [*path, "--help"])
        assert r.exit_code == 0 and len(r.output.strip().splitlines()) > 3, path


@pytest.mark.long_running
def test_demo_runs(tmp_path, monkeypatch):
    _shipped()
    monkeypatch.chdir(tmp_path)
    r = CliRunner().invoke(main, ["demo", "--examinees", "200"])
    assert r.exit_code == 0, r.output
    assert (tmp_path / "demo_output" / "report.html").exists()
    assert "staff-climate" in r.output and "stopped:" in r.output
    assert "agree)" in r.output  # each answer with its category label (every survey label says agree)
    assert "Exposure section says why" in r.output  # the shipped design misses 0.25; the demo says so


def test_demo_without_the_example_files_names_what_is_missing(tmp_path, monkeypatch):
    # as from an installed (non-editable) package: no checkout next to the package or in
    # the current folder
    from adaptive_engine import demo

    monkeypatch.chdir(tmp_path)
    monkeypatch.setattr(demo, "__file__", str(tmp_path / "site" / "adaptive_engine" / "demo.py"))
    r = CliRunner().invoke(main, ["demo", "--examinees", "20"])
    assert r.exit_code == 2
    assert "--files" in r.output and "simulations/licensing_exam.toml" in r.output
    assert "item_banks/staff_climate_survey.csv" in r.output
    assert not (tmp_path / "demo_output").exists()
    # pointing --files at a checkout runs it from anywhere
    _shipped()
    r = CliRunner().invoke(main, ["demo", "--examinees", "30", "--files", str(ROOT), "--out", "d"])
    assert r.exit_code == 0, r.output
    assert (tmp_path / "d" / "report.html").exists()


# -- progress ------------------------------------------------------------------------------

def test_progress_inside_a_single_chunk():
    bank = small_bank()
    theta = np.linspace(-2, 2, 60)
    calls = []
    simulation.simulate(DESIGN, bank, true_theta=theta, seed=6, progress=lambda d, t: calls.append((d, t)))
    done = [d for d, _ in calls]
    assert all(t == 60 for _, t in calls)
    assert done[-1] == 60 and done.count(60) == 1  # the total is reached once, at the very end
    assert len(calls) >= DESIGN.stopping.min_items  # one call per round of answers, not per chunk
    assert done == sorted(done) and 0 < done[-2] < 60


def test_progress_of_an_exposure_calibration():
    from adaptive_engine.simulation import Execution, Population
    from adaptive_engine.simulation.exposure_tuning import calibrate_sympson_hetter

    bank = small_bank()
    calls = []
    design = Design(stopping=Stopping(min_items=5, max_items=5))
    cal = calibrate_sympson_hetter(design, bank, target=0.3,
                                   population=Population(true_theta=np.linspace(-2, 2, 40), seed=1),
                                   execution=Execution(progress=lambda d, t: calls.append((d, t))), max_iterations=3)
    done = [d for d, _ in calls]
    assert {t for _, t in calls} == {3 * 40}
    assert done == sorted(done) and done[-1] == 120 and done.count(120) == 1
    # each iteration's examinees advance the bar
    assert max(d for d in done[:-1]) >= 40 * (len(cal.history) - 1)


def test_progress_bar_quiet_unless_asked():
    import io

    from adaptive_engine.cli.simulate_commands import _Progress

    quiet = io.StringIO()  # not a terminal: no bar by default
    bar = _Progress("run", stream=quiet, delay=0)
    bar(5, 10)
    bar(10, 10)
    assert quiet.getvalue() == ""
    short = io.StringIO()  # a run shorter than the delay stays quiet even when enabled
    bar = _Progress("run", stream=short, enabled=True, delay=60)
    bar(10, 10)
    assert short.getvalue() == ""
    shown = io.StringIO()
    bar = _Progress("run", stream=shown, enabled=True, delay=0)
    bar(5, 10)
    bar(10, 10)
    bar(10, 10)
    assert shown.getvalue().count("\n") == 1 and "10/10" in shown.getvalue() and "run [" in shown.getvalue()


def test_simulate_cli_progress_on_request(tmp_path, monkeypatch):
    from adaptive_engine.cli import simulate_commands

    design, bank = _shipped()
    monkeypatch.setattr(simulate_commands, "PROGRESS_DELAY", 0.0)
    r = CliRunner().invoke(main, ["simulate", design, "--bank", bank, "--examinees", "40", "--out",
                                  str(tmp_path / "s"), "--progress", "--json"])
    assert r.exit_code == 0, r.output
    assert "simulating [" in r.stderr and "40/40" in r.stderr
    json.loads(r.stdout)  # stdout stays clean JSON
    r = CliRunner().invoke(main, ["simulate", design, "--bank", bank, "--examinees", "40", "--out",
                                  str(tmp_path / "s2"), "--json"])
    assert r.exit_code == 0 and r.stderr == ""


def test_examinee_count_follows_a_grid_or_file_spec(tmp_path):
    spec = examinees.parse_ability_spec("grid:-2,2,5:4")
    assert examinees.examinee_count(spec, None, default=1000) == 20
    assert examinees.examinee_count(spec, 20, default=1000) == 20
    assert examinees.examinee_count(examinees.parse_ability_spec("normal:0,1"), None, default=7) == 7
    with pytest.raises(examinees.AbilitySpecError, match="n_examinees"):
        examinees.examinee_count(spec, 300, default=1000)
    design, bank = _shipped()
    runner = CliRunner()
    r = runner.invoke(main, ["simulate", design, "--bank", bank, "--examinees", "300", "--theta",
                             "grid:-2,2,5:40", "--out", str(tmp_path / "s")])
    assert r.exit_code == 2 and "--examinees" in r.output and "200" in r.output
    assert not (tmp_path / "s").exists()
    r = runner.invoke(main, ["simulate", design, "--bank", bank, "--theta", "grid:-2,2,5:4",
                             "--out", str(tmp_path / "g")])
    assert r.exit_code == 0, r.output
    people = list(csv.DictReader((tmp_path / "g" / "examinees.csv").open()))
    assert len(people) == 20
    assert sorted(float(p["true_theta"]) for p in people) == sorted(np.repeat([-2.0, -1, 0, 1, 2], 4))
    r = runner.invoke(main, ["tune", design, "--bank", bank, "--vary", "stopping.se=0.3,0.5", "--theta",
                             "grid:-1,1,3:10", "--out", str(tmp_path / "t")])
    assert r.exit_code == 0, r.output
    assert json.loads((tmp_path / "t" / "tuning.json").read_text())["examinees"] == 30
    r = runner.invoke(main, ["exposure", "calibrate", design, "--bank", bank, "--target", "0.3", "--theta",
                             "grid:-1,1,3:10", "--examinees", "100", "--out", str(tmp_path / "x.csv")])
    assert r.exit_code == 2 and "--examinees" in r.output and not (tmp_path / "x.csv").exists()


def test_exposure_calibrate_exit_codes_and_unreachable_target(tmp_path):
    design, bank = _shipped()
    runner = CliRunner()
    out = tmp_path / "k.csv"
    # 0.01 x 480 operational items = 4.8 items per test, but tests run to 15: out of reach
    r = runner.invoke(main, ["exposure", "calibrate", design, "--bank", bank, "--target", "0.01", "--examinees",
                             "40", "--iterations", "2", "--out", str(out)])
    assert r.exit_code == 3, r.output
    assert "warning:" in r.stderr and "cannot be reached" in r.stderr and "did not converge" in r.stdout
    assert out.exists()  # the parameters reached so far are written
    r = runner.invoke(main, ["exposure", "calibrate", design, "--bank", bank, "--target", "0.8", "--examinees",
                             "200", "--iterations", "6", "--tolerance", "0.05", "--out", str(out)])
    assert r.exit_code == 0 and r.stderr == "" and "converged" in r.stdout
    r = runner.invoke(main, ["exposure", "calibrate", design, "--bank", bank, "--target", "1.5", "--out", str(out)])
    assert r.exit_code == 2 and "--target" in r.output


def test_numbers_in_the_study_tables_are_written_as_their_rounded_repr():
    # examinees.csv writes many numbers by "%.6f" without trailing zeros: the same text as
    # repr(round(x, 6)) (Python's correctly rounded rounding), checked value by value, also
    # on exact ties of the binary value (k / 128), tiny values and negative zero
    # -- and so does the table of bytes examinees.csv is joined from (digits by integer
    # arithmetic), also at the halves of the last place (k / 2e6) and around 1e-4 and 1e9
    from adaptive_engine.simulation.study import _int_matrix, _joined_rows, _number_matrix, _nums

    rng = np.random.default_rng(41)
    values = np.concatenate([rng.normal(size=2000) * 3, rng.normal(size=500) * 1e-3, rng.uniform(-1e9, 1e9, 300),
                             np.arange(-300, 300) / 128, np.arange(-300, 300) / 2e6 + 0.25,
                             [0.0, -0.0, 1e-4, -1e-4, -5e-7, 9.99999e-5, np.nan, np.inf, -np.inf, 3e15, 1e9,
                              999999999.9999996, 123456.0000005]])
    for digits in (0, 2, 6):
        want = ["" if not np.isfinite(x) else repr(round(x, digits)) for x in values.tolist()]
        assert _nums(values, digits) == want
        assert _joined_rows([_number_matrix(values, digits)]).split("\n")[:-1] == want
    ints = np.concatenate([np.arange(-20, 1000), [2**63 - 1, 0, 10**18, 10**18 - 1]]).astype(np.int64)
    for column in (ints, ints[ints >= 0]):
        assert _joined_rows([_int_matrix(column)]).split("\n")[:-1] == [str(v) for v in column.tolist()]


def test_the_examinees_table_is_what_the_csv_module_writes():
    # examinees.csv is joined column by column; the reference writes the same rows with the
    # csv module (Python's standard library) and the numbers as repr(round(x, 6)), with
    # class labels that need quotes (a comma, a quote, a line end)
    from adaptive_engine.design import CutScore, Reporting
    from adaptive_engine.simulation.study import examinees_csv

    cuts = (CutScore(name="pass", theta=0.0, above='pass, "yes"', below="fail"),
            CutScore(name="merit", theta=1.0, above="merit\nline", below='"no" merit'))
    design = Design(stopping=Stopping(min_items=4, max_items=6, se=0.5), reporting=Reporting(cut_scores=cuts))
    result = simulation.simulate(design, small_bank(), true_theta=np.linspace(-2.5, 2.5, 9), seed=4)

    def num(x):
        return "" if not np.isfinite(x) else repr(round(float(x), 6))

    rows = [["examinee", "true_theta", "theta", "se", "n_scored", "stop_reason", "n_pretest", "scaled_score", "seed",
             "class_pass", "class_merit"]]
    for i in range(result.size):
        labels = [c.above if result.at_or_above[i, k] == 1 else c.below if result.at_or_above[i, k] == 0 else ""
                  for k, c in enumerate(cuts)]
        rows.append([i, num(result.true_theta[i]), num(result.theta[i]), num(result.se[i]), int(result.n_scored[i]),
                     str(result.stop_reason[i]), int(result.n_pretest[i]), num(result.scaled_score[i]),
                     int(result.seeds[i]), *labels])
    buf = io.StringIO()
    csv.writer(buf, lineterminator="\n").writerows(rows)
    assert {"pass, \"yes\"", "fail"} <= {r[9] for r in rows[1:]}  # both labels written
    assert examinees_csv(result) == buf.getvalue()


@pytest.mark.parametrize("case", ["blueprint", "polytomous"])
def test_examinees_with_the_same_answers_share_one_kernel_row_and_get_what_their_own_rows_give(monkeypatch, case):
    # Without random draws, the driver keeps one kernel row per history of answers and
    # splits it when answers differ; every result must be what a row per examinee gives.
    import attrs

    from adaptive_engine.design import AreaRule, Blueprint
    from adaptive_engine.kernel import cycle
    from adaptive_engine.kernel.prepared import build_context
    from kernel_support import structured_bank

    if case == "blueprint":
        bank = structured_bank(7, 90, pretest=0)
        design = Design(blueprint=Blueprint(areas=(AreaRule(name="alpha", min=3, max=6),), enemies=True,
                                            item_sets=True),
                        stopping=Stopping(min_items=6, max_items=18, se=0.3))
        true_bank = simulation.perturbed_bank(bank, sd_b=0.2, seed=3)
    else:
        bank, true_bank = structured_bank(8, 60, polytomous=12, pretest=0, sets=False), None
        design = Design(stopping=Stopping(min_items=10, max_items=10))
    ctx = build_context(design, bank)
    assert not cycle.draws_at_random(ctx)
    theta = np.random.default_rng(17).normal(size=300)
    kwargs = dict(seed=5, start=40, true_theta=theta, true_bank=true_bank, count_by_stratum=(-0.5, 0.5))
    shared = simulation.run_chunk(ctx, **kwargs)
    monkeypatch.setattr(cycle, "draws_at_random", lambda ctx: True)
    own = simulation.run_chunk(ctx, **kwargs)
    assert len(np.unique(shared.items[:, :3], axis=0)) < 9  # the first answers were shared
    for field in attrs.fields(simulation.ChunkResult):
        x, y = getattr(shared, field.name), getattr(own, field.name)
        if isinstance(x, np.ndarray):
            assert x.dtype == y.dtype and np.array_equal(x, y, equal_nan=x.dtype.kind == "f"), field.name
        else:
            assert x == y, field.name


def test_the_simulation_commands_ask_glibc_to_keep_freed_memory():
    # glibc takes the mallopt settings (it returns 1 for each); other C libraries are left alone
    import platform
    import sys

    from adaptive_engine.cli.simulate_commands import keep_freed_memory

    on_glibc = sys.platform.startswith("linux") and platform.libc_ver()[0] == "glibc"
    assert keep_freed_memory() is on_glibc
