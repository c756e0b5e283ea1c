"""The two forms of the kernel's grid posterior: log density (decision rules versions 1 and 2)
and density scaled to sum 1 (version 3 on), :mod:`adaptive_engine.irt.posterior`.

The scaled form must give the log form's EAP and posterior SD to about 1e-12 over whole
tests of every shipped design (the same items, the same stops), and a row whose total
underflows must be rescued to the log form's answer.  Both forms are checked against an
outside reference in ``test_reference_eap_grid.py`` (scipy quadrature); here the log form,
which those references pin, is the yardstick of the scaled one.
"""

from __future__ import annotations

import numpy as np
import pytest

import make_golden as golden
from adaptive_engine.irt import models, posterior
from adaptive_engine.kernel import cycle, decision_rules, random_streams
from adaptive_engine.kernel.prepared import build_context, with_log_posterior

#: How closely the forms must agree: a few hundred roundings of 1e-16 on the moments.
AGREE = 1e-12
ONE_DIMENSIONAL = [name for name in golden.design_files() if "two_dimensional" not in name]


def test_the_rule_sets_hold_the_posterior_in_their_forms():
    design = golden.shipped_design("minimal.toml")
    bank = golden.shipped_bank(golden.bank_file_for("minimal.toml"))
    forms = {v: decision_rules.RULE_SETS[v].build_context(design, bank).posterior_form
             for v in decision_rules.installed_versions()}
    assert forms[1] == forms[2] == "log"
    assert all(forms[v] == "scaled" for v in forms if v >= 3)
    assert build_context(design, bank).posterior_form == "scaled"
    assert with_log_posterior(build_context(design, bank)).posterior_form == "log"


@pytest.mark.long_running
@pytest.mark.parametrize("design_file", ONE_DIMENSIONAL)
def test_the_scaled_form_follows_the_log_form_through_whole_tests(design_file):
    # Both forms step through the same tests, answer for answer; after every answer the
    # interim estimate, the posterior's own EAP and SD, the pending item and the stop agree.
    design = golden.shipped_design(design_file)
    bank = golden.shipped_bank(golden.bank_file_for(design_file))
    scaled = build_context(design, bank)
    log = with_log_posterior(scaled)
    n = 1 if design_file == "shadow_test.toml" else 4
    true_theta = np.linspace(-2.0, 2.0, n)
    keys = random_streams.stream_key(np.arange(n, dtype=np.uint64) + 40)
    s_state, _ = cycle.start(scaled, keys)
    l_state, _ = cycle.start(log, keys)
    rng = np.random.default_rng(7)
    worst = 0.0
    while not s_state.done.all():
        assert np.array_equal(s_state.pending, l_state.pending) and np.array_equal(s_state.done, l_state.done)
        rows = np.flatnonzero(~s_state.done)
        items = s_state.pending[rows]
        probs = models.probabilities(bank.params.take(items), true_theta[rows])  # (R, C)
        answers = (rng.random(rows.size)[:, None] > np.cumsum(probs, axis=1)[:, :-1]).sum(axis=1)
        cycle.answer(scaled, s_state, rows, answers)
        cycle.answer(log, l_state, rows, answers)
        for got, want in ((s_state.theta, l_state.theta), (s_state.se, l_state.se),
                          *zip(posterior.posterior_mean_sd(s_state.log_post, scaled.grid, "scaled"),
                               posterior.posterior_mean_sd(l_state.log_post, log.grid, "log"))):
            assert np.allclose(got, want, rtol=0, atol=AGREE)
            worst = max(worst, float(np.max(np.abs(got - want))))
    assert np.array_equal(s_state.items, l_state.items) and np.array_equal(s_state.stop_reason, l_state.stop_reason)
    # the scaled rows are the log rows' exponentials times a factor: their sums lie between
    # RESCALE_TOTAL and 1, and normalised they are the log rows' normalised exponentials
    w = np.exp(l_state.log_post - l_state.log_post.max(axis=1, keepdims=True))
    totals = s_state.log_post.sum(axis=1, keepdims=True)
    assert np.all((totals >= posterior.RESCALE_TOTAL) & (totals <= 1.0 + 1e-12))
    assert np.allclose(s_state.log_post / totals, w / w.sum(axis=1, keepdims=True), rtol=1e-10, atol=1e-300)
    s_final = cycle.final_estimates(scaled, s_state, np.arange(n), scores_only=True)
    l_final = cycle.final_estimates(log, l_state, np.arange(n), scores_only=True)
    assert np.allclose(s_final.theta, l_final.theta, rtol=0, atol=AGREE)
    assert np.allclose(s_final.se, l_final.se, rtol=0, atol=AGREE)
    assert worst > 0.0 or design.scoring.method.value != "eap"  # the forms do round differently


def _steep_wrong_answer(grid, slope, b):
    """Log and plain probability table (1, 2, G) of one 2PL item with slope ``slope`` (D a)."""
    log_wrong = -np.logaddexp(0.0, slope * (grid - b))
    log_right = -np.logaddexp(0.0, -slope * (grid - b))
    log_table = np.stack([log_wrong, log_right])[None, :, :]
    return log_table, np.exp(log_table)


def test_a_row_whose_total_underflows_is_rescued_to_the_log_forms_answer(monkeypatch):
    # A tight prior at 4 (SD 0.2) and a wrong answer to a very steep easy item (D a = 150,
    # b = -6): the posterior moves to about -2, where the prior row is e^-450 of its peak
    # and the item's probability e^-600.  The product of the two underflows to zero at
    # every grid point (below 1e-308), so the scaled row must be redone from logarithms;
    # the log form adds them without trouble.
    grid = np.round(np.linspace(-6.0, 6.0, 241), 10)
    log_table, table = _steep_wrong_answer(grid, 150.0, -6.0)
    log_prior = posterior.normal_log_prior(grid, np.array([4.0, 0.0]), np.array([0.2, 1.0]))  # (2, G)
    items, answers = np.array([0, 0]), np.array([0, 1])  # row 1: an ordinary answer beside it
    log_row = log_prior.copy()
    want_mean, want_sd = posterior.add_and_summarize(log_row, np.arange(2), log_table, items, answers, grid)
    scaled = posterior.scaled_density(log_prior)
    assert np.sum(scaled[0] * table[0, 0]) == 0.0  # the plain product is lost entirely
    got = scaled.copy()
    mean, sd = posterior.multiply_and_summarize(got, np.arange(2), table, log_table, items, answers, grid)
    assert abs(want_mean[0] - (-2.0)) < 0.1  # where the posterior went
    assert np.allclose(mean, want_mean, rtol=0, atol=AGREE) and np.allclose(sd, want_sd, rtol=0, atol=AGREE)
    # the same row (the rescued one summing to 1), apart from the last digits of weights
    # below 1e-15 (the scaled prior is subnormal, or 0, where it is more than about 708
    # below its peak in log density; the log form's posterior is below 1e-17 there); the
    # ordinary row is the product, its sum the answer's predictive probability
    want = posterior.scaled_density(log_row)
    assert np.allclose(got[0], want[0], rtol=1e-9, atol=1e-15)
    assert (scaled[0] == 0).any() and np.all(want[0, scaled[0] == 0] < 1e-17)
    assert abs(got[0].sum() - 1.0) < 1e-14
    assert np.array_equal(got[1], scaled[1] * table[0, 1])
    assert np.allclose(got[1] / got[1].sum(), want[1], rtol=1e-9, atol=1e-300)
    # the rescue is what makes it right: without it the row is 0 / 0
    monkeypatch.setattr(posterior, "RESCUE_TOTAL", 0.0)
    lost = scaled.copy()
    with np.errstate(invalid="ignore", divide="ignore"):
        bad_mean, _ = posterior.multiply_and_summarize(lost, np.arange(2), table, log_table, items, answers, grid)
    assert np.isnan(bad_mean[0]) and bad_mean[1] == mean[1]


def test_a_rescued_row_is_the_same_alone_and_in_a_batch(monkeypatch):
    # blocks of 3 rows, the rescued one in the middle of the second block and alone
    grid = np.round(np.linspace(-6.0, 6.0, 241), 10)
    log_table, table = _steep_wrong_answer(grid, 150.0, -6.0)
    monkeypatch.setattr(posterior, "BLOCK_VALUES", 3 * grid.size)
    means = np.array([0.0, 1.0, -1.0, 0.5, 4.0, 2.0, -0.5])
    scaled = posterior.scaled_density(posterior.normal_log_prior(grid, means, np.where(means == 4.0, 0.2, 0.8)))
    items = np.zeros(means.size, dtype=np.int64)
    answers = np.array([1, 0, 1, 1, 0, 1, 0])
    batch = scaled.copy()
    b_mean, b_sd = posterior.multiply_and_summarize(batch, np.arange(means.size), table, log_table, items, answers,
                                                    grid)
    for r in range(means.size):
        alone = scaled[r : r + 1].copy()
        mean, sd = posterior.multiply_and_summarize(alone, np.arange(1), table, log_table, items[r : r + 1],
                                                    answers[r : r + 1], grid)
        assert mean[0] == b_mean[r] and sd[0] == b_sd[r] and np.array_equal(alone[0], batch[r])


def test_a_row_whose_sum_falls_below_the_bound_is_rescaled_by_a_power_of_two(monkeypatch):
    # Answers of probability about 1e-16 at every grid point: after two of them a row's sum
    # is about 1e-32, below RESCALE_TOTAL (2^-100, about 8e-31).  The row is then the
    # product times a power of two (exactly: only exponents move), its sum in [1/2, 1), and
    # its moments those of the product; alone and in a batch alike.
    grid = np.round(np.linspace(-6.0, 6.0, 241), 10)
    table = (1e-16 * (1.0 + 0.5 * np.sin(grid)))[None, None, :] * np.ones((1, 2, 1))
    log_table = np.log(table)
    means = np.array([0.0, 1.5, -2.0, 0.5, -0.5])
    start = posterior.scaled_density(posterior.normal_log_prior(grid, means, np.full(means.size, 0.9)))
    items = np.zeros(means.size, dtype=np.int64)
    answers = np.array([1, 0, 1, 1, 0])
    got = start.copy()
    posterior.multiply_and_summarize(got, np.arange(means.size), table, log_table, items, answers, grid)
    assert np.array_equal(got, start * table[0, 0])  # a sum of about 1e-16: kept as it is
    product = got * table[0, 0]
    monkeypatch.setattr(posterior, "BLOCK_VALUES", 2 * grid.size)
    mean, sd = posterior.multiply_and_summarize(got, np.arange(means.size), table, log_table, items, answers, grid)
    factor = got[:, :1] / product[:, :1]
    assert np.all(np.frexp(factor)[0] == 0.5) and np.all(factor > 2.0**99)  # powers of two
    assert np.array_equal(got, product * factor)
    assert np.all((got.sum(axis=1) >= 0.5) & (got.sum(axis=1) < 1.0))
    m_ref, s_ref = posterior.posterior_mean_sd(product, grid, "scaled")
    assert np.allclose(mean, m_ref, rtol=0, atol=1e-14) and np.allclose(sd, s_ref, rtol=0, atol=1e-14)
    for r in range(means.size):
        alone = start[r : r + 1] * table[0, 0]
        one_mean, one_sd = posterior.multiply_and_summarize(alone, np.arange(1), table, log_table, items[r : r + 1],
                                                            answers[r : r + 1], grid)
        assert one_mean[0] == mean[r] and one_sd[0] == sd[r] and np.array_equal(alone[0], got[r])


def test_multiplying_in_blocks_equals_the_whole_batch_and_skips_unscored_answers(monkeypatch):
    # scattered and consecutive rows, pretest answers (-1: nothing multiplied), blocks of 4
    from kernel_support import structured_bank

    bank = structured_bank(3, 60, polytomous=6)
    grid = np.linspace(-6, 6, 121)
    log_table = np.ascontiguousarray(bank.log_probability_table(grid).transpose(0, 2, 1))
    table = np.exp(log_table)
    rng = np.random.default_rng(22)
    start = posterior.scaled_density(rng.normal(size=(50, grid.size)) * 3)
    rows = np.sort(rng.choice(50, size=31, replace=False))
    items = rng.integers(0, bank.n_items, size=rows.size)
    items[::4] = -1
    cats = rng.integers(0, 2, size=rows.size)
    sel = items >= 0
    for r in (rows, np.arange(10, 41)):
        whole = start.copy()
        m_whole, s_whole = posterior.multiply_and_summarize(whole, r, table, log_table, items, cats, grid)
        monkeypatch.setattr(posterior, "BLOCK_VALUES", 4 * grid.size)
        got = start.copy()
        mean, sd = posterior.multiply_and_summarize(got, r, table, log_table, items, cats, grid)
        monkeypatch.undo()
        assert np.array_equal(got, whole) and np.array_equal(mean, m_whole) and np.array_equal(sd, s_whole)
        # the rows answered hold the products (the rows of pretest answers as they were),
        # the others are untouched
        product = start[r].copy()
        product[sel] *= table[items[sel], cats[sel]]
        assert np.array_equal(got[r], product)
        untouched = np.setdiff1d(np.arange(50), r)
        assert np.array_equal(got[untouched], start[untouched])
        m_ref, s_ref = posterior.posterior_mean_sd(product, grid, "scaled")
        assert np.allclose(mean, m_ref, rtol=0, atol=1e-14) and np.allclose(sd, s_ref, rtol=0, atol=1e-14)


def test_an_unknown_form_is_refused():
    with pytest.raises(ValueError, match="posterior form 'linear'"):
        posterior.posterior_weights(np.ones((1, 3)), "linear")


def test_a_bank_too_large_for_the_probability_table_gets_the_same_tests(monkeypatch):
    # Without the table (a very large bank) the update takes exp of the log rows it needs:
    # numpy's exp gives an element the same value in any array, so every decision, estimate
    # and posterior row is the same, in a batch and one at a time.
    from adaptive_engine.kernel import prepared

    design = golden.shipped_design("licensing_exam.toml")
    bank = golden.shipped_bank(golden.bank_file_for("licensing_exam.toml"))
    keys = random_streams.stream_key(np.arange(6, dtype=np.uint64) + 3)
    answers_of = np.random.default_rng(12)
    draws = answers_of.random((40, 6))

    def run(ctx, rows):
        state, _ = cycle.start(ctx, keys[rows])
        step = 0
        while not state.done.all():
            going = np.flatnonzero(~state.done)
            cycle.answer(ctx, state, going, (draws[step, rows[going]] < 0.6).astype(np.int64))
            step += 1
        return state

    with_table = build_context(design, bank)
    kept = with_table.probability_table_by_category
    assert kept is not None
    want = run(with_table, np.arange(6))
    monkeypatch.setattr(prepared, "PROBABILITY_TABLE_BYTES", 0)
    without = build_context(design, bank)
    assert without.probability_table_by_category is None
    for rows in (np.arange(6), np.array([4])):
        got = run(without, rows)
        for name in ("items", "responses", "theta", "se", "stop_reason", "log_post"):
            assert np.array_equal(getattr(got, name), getattr(want, name)[rows]), name
    # the premise, checked directly: exp of gathered rows equals the rows of exp of the table
    table = with_table.log_table_by_category
    idx = np.random.default_rng(3).integers(0, table.shape[0], 50)
    assert np.array_equal(np.exp(table[idx, 1]), kept[idx, 1])
