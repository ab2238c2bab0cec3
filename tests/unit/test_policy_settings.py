"""The policies table of the report: every setting a policy ran with, resolved, and the rules' own
warnings (Policy.caution) for settings that make a policy a weak baseline."""

import re

import pytest

from simlab.policies import POLICIES
from simlab.report.describe import _assumptions
from simlab.study.spec import parse_study

AMPLITUDE = 2.0


def _study(*policies, batch=1):
    return parse_study({"study": {"replicates": 2}, "space": {"feed": [0.0, 1.0], "heat": [20.0, 40.0]},
                        "world": {"lengthscale": [0.3, 6.0], "amplitude": AMPLITUDE, "noise": 0.1},
                        "campaign": {"initial": 2, "budgets": [4], "batch": batch}, "target": {"regret": 0.1},
                        "policy": list(policies)}, source="test")


def _row(page, label):
    """The policies table's row of one label."""
    match = re.search(rf"<tr><td>{re.escape(label)}</td>(.*?)</tr>", page)
    assert match, label
    return match.group(1)


def _cautions(page):
    """Labels with a caution under the policies table."""
    if 'id="policy-cautions"' not in page:
        return {}
    box = page[page.index('id="policy-cautions"'):]
    box = box[:box.index("</div>")]
    return dict(re.findall(r"<li><b>(.*?)</b>: (.*?)</li>", box))


def test_every_setting_is_shown_resolved_with_its_help_text():
    # with rounds of two trials every setting counts, the round-filling ones (fill, lie) too; how a rule treats
    # limits (feasible) only in a study with limits or failures
    rounds = _row(_assumptions(_study({"rule": "pi", "label": "PI"}, batch=2), "test"), "PI")
    for key, option in POLICIES["pi"].options.items():          # every setting and its help text
        if key == "feasible":
            assert "<code>feasible = " not in rounds
            continue
        assert f"<code>{key} = " in rounds and option.help.replace('"', "&quot;") in rounds
    assert rounds.index("margin = ") < rounds.index("fill = ")  # the rule's own setting first
    page = _assumptions(_study({"rule": "pi", "label": "PI"}, {"rule": "ei", "label": "EI", "margin": 0.05},
                               {"rule": "random", "label": "Random"}), "test")
    row = _row(page, "PI")
    assert "<code>margin = 0</code>" in row                    # the default, written out, not "defaults"
    for key, option in POLICIES["pi"].options.items():          # one trial per round: all but fill and lie
        shown = f"<code>{key} = " in row
        assert shown == (key not in ("fill", "lie", "feasible")), key
    assert "<code>margin = 0.05</code>" in _row(page, "EI")
    assert "<td>defaults</td>" not in page                     # what the table said before
    assert "none (the rule has no settings)" in _row(page, "Random")


def test_pi_with_margin_zero_is_called_greedy_and_with_margin_one_hundredth_is_not():
    """A margin of about 0.01 x the amplitude: Lizotte (2008, PhD thesis; as summarised by Brochu, Cora &
    de Freitas 2010, arXiv:1012.2599), from memory; margin 0 is greedy (common practice)."""
    page = _assumptions(_study({"rule": "pi", "label": "PI greedy", "margin": 0.0},
                               {"rule": "pi", "label": "PI xi", "margin": 0.01 * AMPLITUDE}), "test")
    cautions = _cautions(page)
    assert "PI greedy" in cautions and "PI xi" not in cautions
    assert "Greedy" in cautions["PI greedy"] and "0.01 × the prior amplitude (here 0.02" in cautions["PI greedy"]


def test_a_confidence_bound_at_one_width_or_a_small_width_is_flagged():
    """Widths of about 2-3 posterior sd: common practice; below 1 the rule is close to the posterior mean."""
    alone = _cautions(_assumptions(_study({"rule": "lcb", "label": "UCB", "width": 2.0}), "test"))
    assert "one width only (2)" in alone["UCB"] and "explores little" not in alone["UCB"]
    small = _cautions(_assumptions(_study({"rule": "lcb", "label": "UCB", "width": 0.5}), "test"))
    assert "explores little" in small["UCB"]
    # control: two widths in the study, neither small: no caution
    two = _cautions(_assumptions(_study({"rule": "lcb", "label": "UCB 2", "width": 2.0},
                                        {"rule": "lcb", "label": "UCB 3", "width": 3.0}), "test"))
    assert two == {}


def test_thompson_with_few_features_is_flagged_and_with_the_default_is_not():
    """Fewer than 128 random features per sample: a coarse approximation (common practice)."""
    cautions = _cautions(_assumptions(_study({"rule": "thompson", "label": "TS few", "features": 32},
                                             {"rule": "thompson", "label": "TS"}), "test"))
    assert set(cautions) == {"TS few"} and "32 spectral frequencies" in cautions["TS few"]


@pytest.mark.parametrize("rule", sorted(POLICIES))
def test_every_rule_answers_caution_with_text_or_none(rule):
    study = _study({"rule": rule, "label": "x"})
    words = POLICIES[rule].caution(study.policies[0].options, study)
    assert words is None or (isinstance(words, str) and words.endswith(".") and words[0].isupper())
