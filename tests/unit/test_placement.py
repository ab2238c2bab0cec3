"""Where trials land (simlab.evidence.placement): shares on the boundary and in corners against a hand
count, intervals against scipy, uniform points against the exact probability, and what the page says."""

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from simlab.evidence.intervals import share_interval
from simlab.evidence.placement import edge_flags, effective_trials, own_trials, placement_table
from simlab.report.cells import Cells
from simlab.report.files import PLACEMENT
from simlab.report.landing import placement_section
from simlab.study.spec import parse_study

NAMES, LOW, HIGH = ["temp", "speed"], [0.0, 100.0], [10.0, 300.0]   # 1 % bands: 0.1 and 2


def _frame(policy, points, *, initial=(), history=()):
    """Traces rows of one campaign: history rows (trial <= 0), initial design, then the policy's own trials."""
    rows = []
    for k, (a, b) in enumerate(history):
        rows.append({"policy": policy, "replicate": 0, "trial": k - len(history) + 1, "initial": False,
                     "history": True, "temp": a, "speed": b})
    for k, (a, b) in enumerate(initial):
        rows.append({"policy": policy, "replicate": 0, "trial": k + 1, "initial": True, "history": False,
                     "temp": a, "speed": b})
    for k, (a, b) in enumerate(points):
        rows.append({"policy": policy, "replicate": 0, "trial": len(initial) + k + 1, "initial": False,
                     "history": False, "temp": a, "speed": b})
    return pd.DataFrame(rows)


# Policy "A": six own trials, counted by hand (band 1 % of the range: 0.1 on temp, 2 on speed).
A_POINTS = [
    (0.1, 200.0),      # temp exactly on the band at its low bound: boundary
    (5.0, 298.0),      # speed exactly on the band at its high bound: boundary
    (0.0, 300.0),      # a vertex of the box: boundary and corner
    (9.9, 102.0),      # on the band of both inputs, at opposite ends: boundary and corner
    (5.0, 200.0),      # the middle: neither
    (0.15, 203.0),     # 1.5 % from the low bound of temp: neither (the negative control)
]
# hand count: boundary rows 1-4 (4 of 6), corners rows 3-4 (2 of 6)
A_BOUNDARY, A_CORNER = 4, 2
# Policy "B": two own trials; its initial design and history sit in corners and must not count.
B_POINTS = [(5.0, 200.0), (0.05, 250.0)]
B_BOUNDARY, B_CORNER = 1, 0
CORNERS = [(0.0, 100.0), (10.0, 300.0)]


@pytest.fixture
def traces():
    return pd.concat([_frame("A", A_POINTS, initial=CORNERS),
                      _frame("B", B_POINTS, initial=CORNERS, history=CORNERS)], ignore_index=True)


def test_shares_match_a_hand_count(traces):
    table = placement_table(traces, names=NAMES, low=LOW, high=HIGH).set_index("policy")
    # hand count above (the definition: within 1 % of the range of any bound; corners on every input)
    assert table.loc["A", "trials"] == 6 and table.loc["B", "trials"] == 2
    assert table.loc["A", "on_boundary"] == A_BOUNDARY and table.loc["A", "in_corner"] == A_CORNER
    assert table.loc["B", "on_boundary"] == B_BOUNDARY and table.loc["B", "in_corner"] == B_CORNER
    assert table.loc["A", "boundary_share"] == pytest.approx(4 / 6, abs=1e-15)
    assert table.loc["A", "corner_share"] == pytest.approx(2 / 6, abs=1e-15)
    assert table.loc["B", "boundary_share"] == pytest.approx(1 / 2, abs=1e-15)
    assert list(table.index) == ["A", "B"]                     # study (first appearance) order
    assert np.isnan(table.loc["A", "boundary_worlds_low"])    # one campaign: no between-campaign variance


def test_initial_design_and_history_are_not_the_policys_trials(traces):
    own = own_trials(traces)
    assert len(own) == len(A_POINTS) + len(B_POINTS)
    assert (own["trial"] >= 1).all() and not own["initial"].any() and not own["history"].any()


def test_a_point_at_one_and_a_half_percent_is_not_counted():
    """Negative control: 1.5 % from a bound is outside the 1 % band, and inside a 2 % band."""
    point = np.array([[0.15, 200.0], [9.85, 200.0], [5.0, 103.0], [5.0, 297.0]])
    assert not edge_flags(point, LOW, HIGH).any()
    assert edge_flags(point, LOW, HIGH, band=0.02).any(axis=1).all()


def test_the_band_edge_counts_after_the_unit_cube_round_trip():
    """Inputs reach the traces as low + u * range (Space.from_unit); u = 0.01 is on the band's edge, 0.0101 is not."""
    study = parse_study({"study": {"replicates": 2}, "space": {"temp": [180.0, 240.0], "speed": [40.0, 120.0]},
                         "world": {"lengthscale": [15.0, 25.0], "amplitude": 4.0, "noise": 0.8},
                         "campaign": {"initial": 2, "budgets": [4]}, "target": {"regret": 1.0},
                         "policy": [{"rule": "random"}]}, source="test")
    u = np.array([[0.01, 0.5], [0.99, 0.5], [0.5, 0.01], [0.5, 0.99], [0.0101, 0.5], [0.5, 0.9899]])
    flags = edge_flags(study.space.from_unit(u), study.space.low, study.space.high).any(axis=1)
    assert flags.tolist() == [True, True, True, True, False, False]


def test_intervals_are_scipys_exact_binomial_intervals(traces):
    """Clopper-Pearson: scipy.stats.binomtest(k, n).proportion_ci(method="exact")."""
    table = placement_table(traces, names=NAMES, low=LOW, high=HIGH)
    for row in table.itertuples():
        for what, count in (("boundary", row.on_boundary), ("corner", row.in_corner)):
            ci = stats.binomtest(int(count), int(row.trials)).proportion_ci(confidence_level=0.95, method="exact")
            assert getattr(row, f"{what}_low") == pytest.approx(ci.low, abs=1e-12)
            assert getattr(row, f"{what}_high") == pytest.approx(ci.high, abs=1e-12)


def test_uniform_trials_land_on_the_boundary_as_often_as_the_volume_says():
    """Uniform points in d inputs: P(boundary) = 1 - (1 - 2b)^d, P(corner) = (2b)^d (the volume of the bands)."""
    rng = np.random.default_rng(20261202)
    n, d, band = 40_000, 3, 0.01
    U = rng.random((n, d))
    frame = pd.DataFrame(U, columns=["a", "b", "c"]).assign(policy="uniform", replicate=0, trial=np.arange(n) + 1,
                                                            initial=False, history=False)
    row = placement_table(frame, names=["a", "b", "c"], low=[0, 0, 0], high=[1, 1, 1], band=band).iloc[0]
    p_edge = 1 - (1 - 2 * band) ** d                         # 0.0588
    p_corner = (2 * band) ** d                               # 8e-6: expect 0.32 of 40 000
    sd = np.sqrt(p_edge * (1 - p_edge) / n)                  # binomial Monte Carlo sd, 0.0012
    assert abs(row["boundary_share"] - p_edge) < 4 * sd
    assert row["boundary_low"] <= p_edge <= row["boundary_high"]
    assert row["in_corner"] <= stats.poisson.ppf(0.9995, n * p_corner)   # 3: P(Poisson(0.32) > 3) < 5e-4
    # control: a band of 2 % must give a clearly larger share (the count is not blind to the band)
    wider = placement_table(frame, names=["a", "b", "c"], low=[0, 0, 0], high=[1, 1, 1], band=0.02).iloc[0]
    assert abs(wider["boundary_share"] - p_edge) > 10 * sd


# --------------------------------------------------------------------------- the page
def _page(shares):
    frame = pd.DataFrame({"policy": [f"P{i}" for i in range(len(shares))], "campaigns": 10, "trials": 300,
                          "on_boundary": [round(300 * s) for s in shares]})
    frame["boundary_share"] = frame["on_boundary"] / 300
    lo, hi = stats.beta.ppf(0.025, np.maximum(frame["on_boundary"], 1), 301 - frame["on_boundary"]), 1.0
    frame = frame.assign(boundary_low=lo, boundary_high=hi, boundary_worlds_low=lo, boundary_worlds_high=hi,
                         in_corner=3, corner_share=0.01, corner_low=0.0, corner_high=0.03, corner_worlds_low=0.0,
                         corner_worlds_high=0.03, band=0.01)
    study = parse_study({"study": {"replicates": 2}, "space": {"a": [0.0, 1.0]},
                         "world": {"lengthscale": 0.2, "amplitude": 1.0, "noise": 0.1},
                         "campaign": {"initial": 2, "budgets": [4]}, "target": {"regret": 0.1},
                         "policy": [{"rule": "random"}]}, source="test")
    return placement_section(study, Cells(PLACEMENT, frame), "")


def test_a_sentence_only_past_a_third_of_the_trials_on_the_boundary():
    """The issue's rule: a sentence when a policy spends more than a third of its trials on the boundary."""
    page = _page([101 / 300, 100 / 300])       # 33.7 % and exactly one third
    assert 'id="boundary-heavy"' in page
    sentence = page[page.index('id="boundary-heavy"'):]
    assert ">P0<" in sentence and ">P1<" not in sentence
    assert 'id="boundary-heavy"' not in _page([0.2, 100 / 300])   # control: nobody past a third


def test_placement_files_are_simlabs_own_for_fresh():
    """--fresh may delete placement.csv and the placement figures, and nothing of the same stem elsewhere."""
    from simlab.replay.store import _own_names

    files, folders = _own_names()
    assert PLACEMENT in files
    assert folders["figures"]("placement.png") and folders["figures"]("placement.svg")
    assert not folders["figures"]("placement.pdf")            # control: only the formats simlab writes


def test_the_figure_draws_the_band_shares_it_counts(traces):
    """The dark end bars of the histograms are the hand-counted shares within 1 % of each bound."""
    from simlab.report.plots import placement_figure

    table = placement_table(traces, names=NAMES, low=LOW, high=HIGH)
    fig = placement_figure(own_trials(traces), names=NAMES, low=LOW, high=HIGH, placement=table)
    heights = {}
    for ax in fig.axes:
        for patch in ax.patches:
            if (patch.get_gid() or "").startswith("band:"):
                heights.setdefault(patch.get_gid(), []).append(patch.get_height())
    # hand count of A_POINTS: temp low band {0.1, 0.0}, high {9.9}; speed low {102}, high {298, 300}
    assert heights["band:A:temp"] == pytest.approx([2 / 6, 1 / 6], abs=1e-15)
    assert heights["band:A:speed"] == pytest.approx([1 / 6, 2 / 6], abs=1e-15)
    assert heights["band:B:temp"] == pytest.approx([1 / 2, 0.0], abs=1e-15)
    texts = [t.get_text() for ax in fig.axes for t in ax.texts]
    assert "boundary 67 %, corners 33 %" in texts


# --------------------------------------------------------------------------- campaigns, not trials
def _coverage(share, icc, *, studies=2000, campaigns=40, trials=25, seed=0):
    """Coverage of the plain (trials) and the campaign-aware (Korn-Graubard) interval of a pooled share.

    Each campaign has its own chance pi_r ~ Beta with mean `share` and intra-campaign correlation
    `icc` (beta-binomial: a + b = 1 / icc - 1), and k_r ~ Bin(trials, pi_r); the pooled share
    estimates `share`.
    """
    rng = np.random.default_rng(seed)
    size = 1.0 / icc - 1.0
    pi = rng.beta(share * size, (1.0 - share) * size, size=(studies, campaigns))
    k = rng.binomial(trials, pi)
    n = campaigns * trials
    lo, hi = share_interval(k.sum(1), n, 0.95)
    eff = np.array([effective_trials(row, np.full(campaigns, trials)) for row in k])
    lo_w, hi_w = share_interval(k.sum(1) / n * eff, eff, 0.95)
    return np.mean((lo <= share) & (share <= hi)), np.mean((lo_w <= share) & (share <= hi_w))


@pytest.mark.parametrize(("share", "icc"), [(0.5, 0.3), (0.06, 0.1), (0.01, 0.05)])
def test_the_campaign_aware_interval_covers_and_the_plain_one_does_not(share, icc):
    """Repeated studies of 40 campaigns x 25 trials (the demo's size) with campaigns that differ in how often
    they go to the edge (design effect 1 + 24 icc, Kish 1965): the Korn-Graubard interval holds 95 %, the
    interval over trials (the negative control) does not. Monte Carlo sd of a coverage at 2000 studies: 0.005."""
    plain, worlds = _coverage(share, icc)
    assert worlds >= 0.93                          # nominal 0.95 less 4 Monte Carlo sd
    assert plain < 0.90                            # control: the trials are not independent


def test_without_campaign_differences_the_campaign_aware_interval_is_the_exact_one():
    """Equal chances in every campaign: n* is about n, and the interval about the binomial one (scipy)."""
    rng = np.random.default_rng(5)
    k = rng.binomial(25, 0.04, size=40)
    eff = effective_trials(k, np.full(40, 25))
    assert 0.5 * 1000 < eff <= 1000 * 1.01
    assert np.isnan(effective_trials(k[:1], np.full(1, 25)))      # one campaign: no variance to estimate
    assert effective_trials(np.zeros(40), np.full(40, 25)) == 1000  # no hit: n, as Korn & Graubard


def test_box_view_counts_only_inputs_with_a_range():
    # stepped and categorical inputs have no boundary, a log input is measured in its logarithm, and a
    # library has none at all (its rows are the allowed trials); common practice, the reading
    from simlab.evidence.placement import box_view
    from simlab.study.types import Library, Space
    space = Space(names=("rate", "dose", "stages", "carrier"), low=(0.0, 0.01, 1.0, 0.0), high=(1.0, 10.0, 4.0, 1.0),
                  kinds=("continuous", "log", "stepped", "categorical"), steps=(0.0, 0.0, 1.0, 0.0),
                  levels=((), (), (), ("oil", "gel")))
    frame = pd.DataFrame({"rate": [0.0, 0.5], "dose": [0.01, 1.0], "stages": [1.0, 4.0], "carrier": ["oil", "gel"]})
    view, names, low, high = box_view(frame, space)
    assert names == ["rate", "dose"]
    np.testing.assert_allclose(view["dose"], np.log([0.01, 1.0]))
    np.testing.assert_allclose(low, [0.0, np.log(0.01)]) and np.testing.assert_allclose(high, [1.0, np.log(10.0)])
    flags = edge_flags(view[names].to_numpy(float), low, high)
    assert flags.tolist() == [[True, True], [False, False]]        # the log bound 0.01 is on it, 1.0 is not
    library = Space(names=("rate",), low=(0.0,), high=(1.0,), kinds=("continuous",), steps=(0.0,), levels=((),),
                    library=Library(file="x.csv", rows=((0.0,), (1.0,))))
    assert box_view(frame, library)[1] == []
