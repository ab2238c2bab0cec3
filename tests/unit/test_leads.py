"""Leads that matter: paired intervals that cover, one error budget for the choice table, sign-test marks, the sweep."""

import math

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from simlab.evidence import choice, compare, intervals, reach
from simlab.report import cells, plots
from simlab.study.dump import dump_study
from simlab.study.spec import StudyError, parse_study
from simlab.replay.sweep import safest_policy


# ---------------------------------------------------------------------------
# helpers
# ---------------------------------------------------------------------------
def _campaigns(seed, *, factors, replicates=50, trials=8):
    """Paired campaigns: log regret(t) = world effect + independent noise - 0.3 t + log factor.

    The world effect is shared by every policy on a replicate (paired worlds); the noise
    is independent per policy, replicate and trial, so two policies with the same factor
    have the same law (an A/A pair) while their campaigns still differ.
    """
    rng = np.random.default_rng(seed)
    world = rng.normal(0.0, 0.6, replicates)
    t = np.arange(1, trials + 1)
    parts = []
    for policy, factor in factors.items():
        noise = rng.normal(0.0, 0.5, (replicates, trials))
        regret = factor * np.exp(world[:, None] + noise - 0.3 * t)
        parts.append(pd.DataFrame({"policy": policy, "replicate": np.repeat(np.arange(replicates), trials),
                                   "trial": np.tile(t, replicates), "regret": regret.ravel()}))
    return pd.concat(parts, ignore_index=True)


def _holm_by_hand(p):
    """Holm (1979) step-down adjusted p-values, written out for three or so values."""
    order = sorted(range(len(p)), key=lambda i: p[i])
    adjusted, running = [0.0] * len(p), 0.0
    for rank, i in enumerate(order):
        running = max(running, min(1.0, (len(p) - rank) * p[i]))
        adjusted[i] = running
    return adjusted


def _old_rule_clear(traces, *, budget, target, success):
    """The rule before issue 11, rebuilt from its parts as the negative control.

    Per attitude, separately at 0.05: Holm-adjusted p < 0.05 against every other policy
    and favoured (regret: Wilcoxon; failure: McNemar); trials: 95 % ranges apart. No
    smallest difference that matters, no sharing of alpha between the attitudes.
    """
    pairs = compare.pairwise(traces, budget=budget, target=target)
    at = traces[traces["trial"] == budget]
    medians = at.groupby("policy")["regret"].median()
    failures = at.assign(f=at["regret"] > target).groupby("policy")["f"].mean()
    plan = reach.budget_plan(traces, target=target, success=success).set_index("policy")
    verdicts = []
    for ranking, favours, p_col in ((medians, "regret_favours", "regret_p_holm"),
                                    (failures, "failure_favours", "failure_p_holm")):
        leader = ranking.idxmin()
        rows = pairs[(pairs["policy_a"] == leader) | (pairs["policy_b"] == leader)]
        verdicts.append(bool(np.all((rows[favours] == leader) & (rows[p_col] < 0.05))))
    reached = plan.dropna(subset=["budget"]).sort_values(["budget", "budget_conservative"])
    if reached.empty:
        verdicts.append(False)
    else:
        leader = reached.index[0]
        conservative = plan.at[leader, "budget_conservative"]
        others = plan.drop(index=leader)["budget_optimistic"]
        verdicts.append(bool(not pd.isna(conservative) and np.all(others.isna() | (others > conservative))))
    return verdicts


# ---------------------------------------------------------------------------
# the win rate's interval (and the paired failure difference's): exact coverage
# ---------------------------------------------------------------------------
def test_exact_bounds_are_scipy_clopper_pearson():
    # Reference: scipy.stats.binomtest(k, n).proportion_ci(method="exact") (Clopper &
    # Pearson 1934); REFERENCES.md: 0 of 50 -> [0, 0.0711217365], 50 of 50 -> [0.9288782635, 1].
    for n in (1, 7, 50, 60):
        for k in range(n + 1):
            ci = stats.binomtest(k, n).proportion_ci(confidence_level=0.95, method="exact")
            low, high = intervals.exact_bounds(np.float64(k), float(n), 0.95)
            assert (float(low), float(high)) == pytest.approx((ci.low, ci.high), abs=1e-12)
    assert intervals.exact_bounds(0.0, 50.0, 0.95)[1] == pytest.approx(0.0711217365, abs=1e-10)
    assert intervals.exact_bounds(50.0, 50.0, 0.95)[0] == pytest.approx(0.9288782635, abs=1e-10)


def _tables(n):
    wins, losses = np.meshgrid(np.arange(n + 1), np.arange(n + 1), indexing="ij")
    keep = wins + losses <= n
    return wins[keep], losses[keep]


def _exact_coverage(low, high, n, grid):
    """Coverage of p_win - p_loss by [low, high], summed exactly over every trinomial table.

    The table probabilities come from scipy.stats.multinomial (the outside reference);
    no Monte Carlo error.
    """
    wins, losses = _tables(n)
    counts = np.column_stack([wins, losses, n - wins - losses])
    out = []
    for p_win, p_loss in grid:
        pmf = stats.multinomial.pmf(counts, n, [p_win, p_loss, max(0.0, 1.0 - p_win - p_loss)])
        delta = p_win - p_loss
        out.append(float(np.sum(pmf[(low <= delta + 1e-12) & (delta - 1e-12 <= high)])))
    return np.array(out)


def _grid():
    edge = np.r_[0.0, np.geomspace(1e-4, 0.15, 14)]
    values = np.unique(np.round(np.r_[edge, 1.0 - edge, np.linspace(0.0, 1.0, 21)], 12))
    return [(a, b) for a in values for b in values if a + b <= 1.0 + 1e-12]


def test_paired_difference_interval_covers_exactly_at_50_replicates():
    n = 50
    wins, losses = _tables(n)
    low, high = compare.paired_difference_interval(wins, losses, n)
    grid = _grid()
    coverage = _exact_coverage(low, high, n, grid)
    # With no ties the interval is Clopper-Pearson, whose coverage is >= the nominal
    # level for every p (Clopper & Pearson 1934); with ties it is wider. Exact sums, so
    # the only tolerance is float rounding.
    assert coverage.min() >= 0.95 - 1e-9, (coverage.min(), grid[int(coverage.argmin())])
    no_ties = [i for i, (a, b) in enumerate(grid) if abs(a + b - 1.0) < 1e-12]
    assert len(no_ties) > 20 and coverage[no_ties].min() >= 0.95 - 1e-9
    # Negative control 1: the Wald interval for paired data (estimate +- z se,
    # se^2 = (p_win + p_loss - d^2) / n; common practice, known to fail near the edges:
    # Newcombe 1998, Stat. Med. 17:2635) must fail the same check.
    d = (wins - losses) / n
    se = np.sqrt(np.maximum((wins + losses) / n - d**2, 0.0) / n)
    wald = _exact_coverage(d - 1.959963984540054 * se, d + 1.959963984540054 * se, n, grid)
    assert wald.min() < 0.93
    # Negative control 2: the same construction at 80 % is too narrow for a 95 % label.
    narrow = _exact_coverage(*compare.paired_difference_interval(wins, losses, n, confidence_level=0.8), n, grid)
    assert narrow.min() < 0.93


@pytest.mark.slow
def test_pairwise_intervals_cover_in_repeated_studies():
    # 200 studies of 50 paired replicates through `pairwise` itself. Pair (a, b): the
    # regret of a is lower by a unit shift on 80 % of worlds and tied on 20 % (true win
    # rate 0.8 * Phi(1/sqrt 2) + 0.1, median difference from the mixture's CDF).
    # Pair (a, c): c is far worse (true win rate 0.998), where every bootstrap resample
    # is all wins. Monte Carlo sd of a 95 % coverage over 200 studies is 0.015; the
    # intervals are conservative (>= 95 % by construction; about 97 % and more here), so
    # 0.93 lies well over 2 sd below what they reach.
    studies, n = 200, 50
    p_win_c = 0.998
    shift_c = math.sqrt(2.0) * stats.norm.ppf(p_win_c)
    true_win = {"b": 0.8 * stats.norm.cdf(1.0 / math.sqrt(2.0)) + 0.1, "c": p_win_c}

    def mixture_cdf(x):
        return 0.8 * stats.norm.cdf((x + 1.0) / math.sqrt(2.0)) + 0.2 * (x >= 0)

    lo, hi = -10.0, 10.0
    for _ in range(200):  # bisection for the smallest x with F(x) >= 1/2
        mid = 0.5 * (lo + hi)
        lo, hi = (lo, mid) if mixture_cdf(mid) >= 0.5 else (mid, hi)
    true_median = {"b": hi, "c": -shift_c}
    rng = np.random.default_rng(20261)
    hits = {(k, q): 0 for k in "bc" for q in ("win", "median")}
    boot_hits = 0
    for s in range(studies):
        world = 30.0 + rng.normal(0.0, 0.5, n)
        ra = world + rng.normal(size=n)
        tie = rng.uniform(size=n) < 0.2
        rb = np.where(tie, ra, world + 1.0 + rng.normal(size=n))
        rc = world + shift_c + rng.normal(size=n)
        traces = pd.DataFrame({"policy": np.repeat(["a", "b", "c"], n), "replicate": np.tile(np.arange(n), 3),
                               "trial": 1, "regret": np.r_[ra, rb, rc]})
        table = compare.pairwise(traces, budget=1, target=100.0)
        table = table[table["policy_a"] == "a"].set_index("policy_b")
        for k in "bc":
            row = table.loc[k]
            hits[(k, "win")] += row["win_rate_low"] <= true_win[k] <= row["win_rate_high"]
            hits[(k, "median")] += row["median_difference_low"] <= true_median[k] <= row["median_difference_high"]
        if s < 60:
            # Negative control: the percentile bootstrap the win rate used before
            # (scipy.stats.bootstrap), on the near-1 pair.
            score = ((ra - rc) < 0).astype(float)
            ci = stats.bootstrap((score,), np.mean, n_resamples=400, method="percentile",
                                 rng=np.random.default_rng(s)).confidence_interval
            boot_hits += ci.low <= true_win["c"] <= ci.high
    coverage = {key: v / studies for key, v in hits.items()}
    assert all(c >= 0.93 for c in coverage.values()), coverage
    assert boot_hits / 60 < 0.5  # the old interval fails the same check (about 10 % at 0.998)


def test_pairwise_uses_the_interval_functions():
    traces = _campaigns(4, factors={"x": 0.7, "y": 1.0})
    row = compare.pairwise(traces, budget=8, target=0.2).iloc[0]
    low, high = compare.paired_difference_interval(row["wins_a"], row["wins_b"], row["replicates"])
    assert (row["win_rate_low"], row["win_rate_high"]) == pytest.approx(((1 + low) / 2, (1 + high) / 2))
    low, high = compare.paired_difference_interval(row["failures_only_a"], row["failures_only_b"], row["replicates"])
    assert (row["failure_difference_low"], row["failure_difference_high"]) == pytest.approx((low, high))
    at = traces[traces["trial"] == 8].pivot(index="replicate", columns="policy", values="regret")
    ci = stats.quantile_test(at["x"] - at["y"], q=0, p=0.5).confidence_interval(0.95)
    assert (row["median_difference_low"], row["median_difference_high"]) == pytest.approx((ci.low, ci.high))


# ---------------------------------------------------------------------------
# the median paired difference's interval: repeated studies
# ---------------------------------------------------------------------------
@pytest.mark.slow
def test_median_interval_covers_in_repeated_studies():
    # 600 studies of 50 paired differences for each law: symmetric, skewed
    # (lognormal - 1, median 0 exactly) and with an atom of ties at 0 holding the
    # median (30 % zeros, the rest N(+-0.1, 1)). The order-statistic interval covers any
    # median with >= P(18 <= Bin(50, 1/2) <= 32) = 0.967 (Conover, Practical
    # Nonparametric Statistics, 3rd ed., 3.2); Monte Carlo sd over 600 studies <= 0.009,
    # so the bar 0.93 lies 4 sd below.
    rng = np.random.default_rng(1951)
    studies, n = 600, 50
    laws = {
        "normal": (lambda size: rng.normal(-0.3, 1.0, size), -0.3),
        "skewed": (lambda size: rng.lognormal(0.0, 1.0, size) - 1.0, 0.0),
        "ties": (lambda size: np.where(rng.uniform(size=size) < 0.3, 0.0,
                                       rng.normal(0.0, 1.0, size) * 0.2 + np.sign(rng.uniform(-1, 1, size)) * 0.1),
                 0.0),
    }
    for name, (draw, median) in laws.items():
        hits, narrow = 0, 0
        for _ in range(studies):
            d = draw(n)
            low, high = compare.median_interval(d)
            hits += low <= median <= high
            low, high = compare.median_interval(d, confidence_level=0.6)
            narrow += low <= median <= high
        assert hits / studies >= 0.93, (name, hits / studies)
        if name != "ties":  # an atom holding the median is covered by nearly any interval
            assert narrow / studies < 0.93, (name, narrow / studies)  # negative control: too narrow must fail
    assert all(math.isnan(v) for v in compare.median_interval(np.arange(5.0)))  # no ranks at n = 5


# ---------------------------------------------------------------------------
# the choice table: A/A rate, positive control, negative control
# ---------------------------------------------------------------------------
@pytest.mark.slow
def test_aa_studies_declare_a_clear_lead_at_most_five_percent_of_the_time():
    # 100 root seeds, each a study with one rule under two labels ("twin", "twin copy":
    # the same regret law on paired worlds) and a clearly worse third policy, so the
    # families contain real rejections too. Any "clear" lead is then false (the leader
    # is always a twin). Bar: 5 % plus 2 Monte Carlo sd at 5 % over 100 studies
    # (sqrt(0.05 * 0.95 / 100) = 0.022), i.e. 0.094.
    seeds = range(100)
    new = old = 0
    for seed in seeds:
        traces = _campaigns(10_000 + seed, factors={"twin": 1.0, "twin copy": 1.0, "worse": 2.0})
        table = choice.choice_table(traces, budget=8, target=0.2, success=0.8, n_resamples=100)
        assert set(table["leader"].dropna()) <= {"twin", "twin copy"}
        new += bool((table["lead"] == "clear").any())
        old += any(_old_rule_clear(traces, budget=8, target=0.2, success=0.8))
    rate, old_rate = new / len(seeds), old / len(seeds)
    assert rate <= 0.05 + 2 * math.sqrt(0.05 * 0.95 / len(seeds)), rate
    # Negative control: the old rule (each attitude at 0.05 on its own, no margin)
    # declares more false leads on the very same studies.
    assert old_rate > rate, (old_rate, rate)


def test_a_clearly_better_policy_is_clear_under_every_attitude():
    # Positive control: a policy with a quarter of the regret on every world, against
    # an A/A pair, at 50 replicates, in 10 studies: every attitude must call it clear
    # (campaigns run to 12 trials, so the plan sees the A/A pair reach the level too).
    for seed in range(10):
        traces = _campaigns(500 + seed, factors={"strong": 0.25, "twin": 1.0, "twin copy": 1.0}, trials=12)
        table = choice.choice_table(traces, budget=8, target=0.1, success=0.8, n_resamples=100)
        assert list(table["leader"]) == ["strong"] * 3
        assert list(table["lead"]) == ["clear"] * 3, table["evidence"].tolist()
        assert table.loc[0, "evidence"].startswith("better than every other policy")


def test_a_tiny_difference_is_a_tie_with_its_reason():
    # 7 % lower regret on 4,000 paired worlds: significant, but the median paired
    # difference (about 0.006 against a target of 0.2) is far below the default
    # difference that matters (0.02). The old rule calls it clear; the new one a tie.
    traces = _campaigns(77, factors={"slightly": 0.93, "plain": 1.0}, replicates=4000, trials=8)
    assert _old_rule_clear(traces, budget=8, target=0.2, success=0.8)[0]
    table = choice.choice_table(traces, budget=8, target=0.2, success=0.8, n_resamples=100)
    row = table.iloc[0]
    assert row["leader"] == "slightly" and row["lead"] == "tie" and row["p_value"] < 0.05 / 3
    assert "too little to matter" in row["evidence"] and "0.02 objective units" in row["evidence"]
    # With a smaller difference that matters the same lead is clear: the margin decides.
    relaxed = choice.choice_table(traces, budget=8, target=0.2, success=0.8, n_resamples=100, difference=0.0)
    assert relaxed.iloc[0]["lead"] == "clear"
    with pytest.raises(ValueError, match="`difference` must be a finite number >= 0"):
        choice.choice_table(traces, budget=8, target=0.2, difference=-1.0)


def test_p_values_below_a_thousandth_print_as_such():
    assert compare.format_p(0.0004) == "< 0.001" and compare.format_p(0.0) == "< 0.001"
    assert compare.format_p(0.001) == "0.001" and compare.format_p(0.0462) == "0.046"
    table = cells.Cells("pairwise.csv", pd.DataFrame({"p": [1e-9, 0.2]}))
    assert ">&lt; 0.001</span>" in table.span(0, "p", "p") and ">0.2</span>" in table.span(1, "p", "p")


# ---------------------------------------------------------------------------
# marks of the win-rate matrix
# ---------------------------------------------------------------------------
def test_win_rate_marks_come_from_the_sign_test():
    # Pair (a, b): a wins 22 of 50 worlds by a lot and loses 28 by a little, so the
    # Wilcoxon signed-rank test favours a clearly while the win rate (44 %) is not
    # separated from 1/2. Pair (a, c): a wins 40 of 50. Reference: scipy.stats.binomtest
    # on wins vs losses, Holm (1979) by hand.
    rng = np.random.default_rng(3)
    n = 50
    base = rng.uniform(5.0, 6.0, n)
    a = base.copy()
    b = np.where(np.arange(n) < 22, base + rng.uniform(2.0, 3.0, n), base - rng.uniform(0.01, 0.02, n))
    c = np.where(np.arange(n) < 40, base + 1.0, base - 1.0)
    traces = pd.DataFrame({"policy": np.repeat(["a", "b", "c"], n), "replicate": np.tile(np.arange(n), 3),
                           "trial": 1, "regret": np.r_[a, b, c]})
    pairs = compare.pairwise(traces, budget=1, target=5.5)
    raw = [stats.binomtest(int(r.wins_a), int(r.wins_a + r.wins_b), 0.5).pvalue for r in pairs.itertuples()]
    np.testing.assert_allclose(pairs["sign_p_holm"], _holm_by_hand(raw), rtol=1e-12)
    ab = pairs[(pairs["policy_a"] == "a") & (pairs["policy_b"] == "b")].iloc[0]
    assert ab["regret_p_holm"] < 0.05 and ab["sign_p_holm"] > 0.05  # the old star would be wrong here
    fig = plots.win_rate_figure(pairs)
    shown = [t.get_text() for t in fig.axes[0].texts]
    expected = set()
    for r, p in zip(pairs.itertuples(), _holm_by_hand(raw)):
        star = "*" if p < 0.05 else ""
        expected |= {f"{r.win_rate:.0%}{star}", f"{1 - r.win_rate:.0%}{star}"}
    assert set(shown) == expected
    assert "44%" in shown and "56%" in shown and "80%*" in shown and "20%*" in shown


# ---------------------------------------------------------------------------
# the sweep: minimax regret
# ---------------------------------------------------------------------------
def _sweep_summary(risks, half_width):
    rows = []
    for policy, by_cell in risks.items():
        for (lf, af), r in by_cell.items():
            rows.append({"policy": policy, "budget": 20, "lengthscale_factor": lf, "amplitude_factor": af,
                         "failure_risk": r, "failure_low": max(0.0, r - half_width),
                         "failure_high": min(1.0, r + half_width), "regret_median": r})
    return pd.DataFrame(rows)


def test_sweep_ranks_by_minimax_regret_not_the_raw_worst_cell():
    # Failure risks over four cells (lengthscale x, amplitude x). Random is mediocre
    # everywhere (0.40); EI is best in three cells and poor in one; UCB is in between.
    cells = [(0.5, 1.0), (1.0, 1.0), (2.0, 1.0), (1.0, 2.0)]
    risks = {"EI": [0.05, 0.04, 0.10, 0.45], "UCB": [0.15, 0.12, 0.20, 0.42], "Random": [0.40, 0.40, 0.40, 0.40]}
    # Savage's (1951) minimax regret by hand. Best per cell: 0.05 (EI), 0.04 (EI),
    # 0.10 (EI), 0.40 (Random). Shortfalls: EI 0, 0, 0, 0.05 -> worst 0.05;
    # UCB 0.10, 0.08, 0.10, 0.02 -> worst 0.10; Random 0.35, 0.36, 0.30, 0 -> worst 0.36.
    # Minimax regret picks EI; the raw worst cell (EI 0.45, UCB 0.42, Random 0.40)
    # would pick Random, the uniformly mediocre policy.
    by_hand = {"EI": 0.05, "UCB": 0.10, "Random": 0.36}
    summary = _sweep_summary({p: dict(zip(cells, r)) for p, r in risks.items()}, half_width=0.005)
    ranking = safest_policy(summary, budget=20).set_index("policy")
    assert list(ranking.index) == ["EI", "UCB", "Random"]
    for policy, worst in by_hand.items():
        assert ranking.at[policy, "worst_shortfall"] == pytest.approx(worst, abs=1e-12)
        assert ranking.at[policy, "worst_failure_risk"] == pytest.approx(max(risks[policy]))
    assert min(risks, key=lambda p: max(risks[p])) == "Random"  # the old rule's pick
    assert (ranking.at["EI", "shortfall_lengthscale_factor"], ranking.at["EI", "shortfall_amplitude_factor"]) == (1.0, 2.0)
    assert ranking.at["EI", "shortfall_best_policy"] == "Random"
    assert (ranking.at["EI", "worst_lengthscale_factor"], ranking.at["EI", "worst_amplitude_factor"]) == (1.0, 2.0)
    assert ranking.at["EI", "correct_belief_failure_risk"] == pytest.approx(0.04)
    # Narrow cell intervals (+-0.5 points): even pessimistically EI (0.06) stays below
    # UCB's optimistic worst shortfall (0.09): clear. Wide ones (+-5 points): a tie.
    assert ranking.at["EI", "lead"] == "clear"
    wide = safest_policy(_sweep_summary({p: dict(zip(cells, r)) for p, r in risks.items()}, half_width=0.05),
                         budget=20)
    assert wide["policy"].iloc[0] == "EI" and wide["lead"].iloc[0] == "tie"


# ---------------------------------------------------------------------------
# the study key
# ---------------------------------------------------------------------------
_BASE = {
    "study": {"name": "lead-key", "replicates": 4, "seed": 1},
    "space": {"feed": [0.0, 1.0]},
    "world": {"kernel": "matern52", "lengthscale": 0.3, "amplitude": 1.0, "mean": 0.0, "noise": 0.1},
    "campaign": {"initial": 2, "budgets": [4]},
    "target": {"regret": 0.5},
    "policy": [{"rule": "ei"}, {"rule": "random"}],
}


def test_target_difference_defaults_validates_and_round_trips():
    study = parse_study(_BASE, source="s.toml")
    assert study.lead_difference == pytest.approx(0.05)  # a tenth of the target regret
    explicit = parse_study({**_BASE, "target": {"regret": 0.5, "difference": 0.2}}, source="s.toml")
    assert explicit.lead_difference == 0.2
    import tomllib

    again = parse_study(tomllib.loads(dump_study(explicit)), source="again.toml")
    assert again == explicit and "difference = 0.2" in dump_study(explicit)
    for bad, words in ((-0.1, "must be >= 0"), (math.inf, "finite"), ("big", "must be a number")):
        with pytest.raises(StudyError) as err:
            parse_study({**_BASE, "target": {"regret": 0.5, "difference": bad}}, source="s.toml")
        message = str(err.value)
        assert "\n" not in message and "s.toml" in message and "target.difference" in message and words in message
