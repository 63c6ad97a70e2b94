"""Tests of the plain-words summaries: what the console may say, and only with evidence behind it."""

from __future__ import annotations

import numpy as np
import pandas as pd

from foretell.compare import selection, selection_blocks, winners
from foretell.models import lookalikes, parse_model
from foretell.text import number, plural
from foretell.summaries import (
    BOR_MAX,
    CLEAR_PXP,
    LINE_WIDTH,
    STANDS_OUT_MARGIN,
    bound_text,
    convergence_text,
    p_words,
    stands_out_at,
    summary_text,
    verdict,
    wrapped,
)


def _selection(pxp, bor, group="all", n=10, criterion="bic", **labels):
    """Selection rows of one comparison with the given protected exceedances and omnibus risk."""
    models = [f"count-{i}" for i in range(len(pxp))]
    return pd.DataFrame(dict(group=group, **labels, model=models, expected_freq=np.nan, exceedance=np.nan,
                             protected_exceedance=pxp, omnibus_risk=bor, freq_concentration=np.nan,
                             n_participants=n, criterion=criterion, method="variational", note=""))


def _winners(best, strength, group="g"):
    return pd.DataFrame(dict(participant=[f"p{i}" for i in range(len(best))], group=group, block="all",
                             best_model=best, runner_up="count-9", criterion="bic", delta=np.nan,
                             strength=strength, n_models=3, note=""))


def test_clear_only_at_the_named_criterion():
    # pxp >= 0.95 for a clear winner (common practice)
    assert CLEAR_PXP == 0.95
    status, leader, words = verdict(_selection([0.96, 0.02, 0.02], 0.01), "model")
    assert (status, leader) == ("clear", "count-0") and "0.96 >= 0.95" in words
    status, leader, words = verdict(_selection([0.94, 0.03, 0.03], 0.01), "model")
    assert (status, leader) == ("ahead", "count-0") and "not clear" in words


def test_nobody_is_ahead_when_the_omnibus_risk_exceeds_one_half():
    # Rigoux et al. (2014): BOR > 0.5 means "all models equally frequent" is the more probable account.
    assert BOR_MAX == 0.5
    status, leader, words = verdict(_selection([0.7, 0.2, 0.1], 0.51), "model")
    assert status == "level" and leader is None
    assert "no model stands out" in words and "count-0" not in words


def test_nobody_is_ahead_near_chance_or_below_one_half():
    # the documented bar: max(1/K + 0.1, 1/2)
    assert STANDS_OUT_MARGIN == 0.1
    assert stands_out_at(2) == 0.6 and stands_out_at(4) == 0.5 and stands_out_at(10) == 0.5
    status, leader, words = verdict(_selection([0.59, 0.41], 0.2), "model")
    assert status == "level" and leader is None and "0.59 < 0.60 with 2 models" in words
    assert verdict(_selection([0.61, 0.39], 0.2), "model")[0] == "ahead"
    status, _, words = verdict(_selection([0.45, 0.25, 0.2, 0.1], 0.2), "model")
    assert status == "level" and "with 4 models" in words
    assert verdict(_selection([0.55, 0.25, 0.1, 0.1], 0.2), "model")[0] == "ahead"


def test_a_number_is_never_rounded_onto_the_bar_it_is_compared_with():
    status, _, words = verdict(_selection([0.9496, 0.0504], 0.01), "model")
    assert status == "ahead" and "0.950 < 0.95" not in words and "0.9496 < 0.95" in words
    status, _, words = verdict(_selection([0.7, 0.3], 0.5004), "model")
    assert status == "level" and "omnibus risk 0.5004 > 0.50" in words


def test_numbers_never_print_as_minus_zero_and_counts_agree_in_number():
    assert number(-0.004, ".2f") == "0.00" and number(-1e-12, ".2f") == "0.00"
    assert number(-0.006, ".2f") == "-0.01" and number(0.5, ".1f") == "0.5"
    assert plural(1, "participant") == "1 participant" and plural(2, "participant") == "2 participants"
    assert plural(0, "family", "families") == "0 families"
    text = summary_text(_winners(["count-0"], ["positive"]),
                        _selection([0.97, 0.03], -1e-12, group="g", n=1))
    assert "-0.00" not in text and "(1 participant)" in text


def test_summary_names_the_criterion_the_blocks_and_the_lookalikes():
    sel = _selection([0.97, 0.02, 0.01], 0.01, group="g", n=3, criterion="cv")
    blocks = pd.concat([_selection([0.9, 0.05, 0.05], 0.05, group="g", block="1"),
                        _selection([0.4, 0.3, 0.3], 0.7, group="g", block="2")])
    text = summary_text(_winners(["count-0", "count-0", "count-1"], ["strong", "bare-mention", None]),
                        sel, blocks, merge=[("count-0", "count-task")])
    lines = text.splitlines()
    assert "cross-validated" in lines[0]
    assert "count-task left out: identical to count-0 on this task" in text
    assert any(line.startswith("group g (3 participants): clear winner: count-0") for line in lines)
    start = lines.index("  by block:")
    by_block = lines[start + 1:start + 4]
    assert by_block[0] == "    block 1: ahead, not clear: count-0 (protected exceedance 0.90 < 0.95, ahead from 0.50 with 3"
    assert by_block[1] == "      models; omnibus risk 0.05)"  # the bar of "ahead" is said, and the line wraps under 100
    assert by_block[2] == "    block 2: no model stands out (omnibus risk 0.70 > 0.50)"
    assert not any("best" in line for line in by_block)  # no counts of per-participant winners here
    own = " ".join(lines[next(i for i, line in enumerate(lines) if "own best model" in line):])
    assert "count-0 2, count-1 1" in own and "1 of 3 participants" in own
    assert "BIC" in summary_text(_winners(["count-0"], ["strong"]), _selection([0.97, 0.03], 0.01))


def test_block_lines_word_a_leader_by_the_same_rule_as_the_whole_session():
    # A block whose leader has protected exceedance 0.54 among 10 models stands out (bar 0.5) but is
    # not clear (< 0.95): the block line must say so in the session verdict's words, not name the
    # model bare as if it stood out; a block at 0.97 is a clear winner; one at 0.40 has no leader.
    rest = lambda top: [top] + [(1 - top) / 9] * 9  # noqa: E731
    blocks = pd.concat([_selection(rest(0.54), 0.01, group="g", block="1"),
                        _selection(rest(0.97), 0.01, group="g", block="2"),
                        _selection(rest(0.40), 0.01, group="g", block="3")])
    session = _selection(rest(0.54), 0.01, group="g")
    text = summary_text(_winners(["count-0"], ["strong"]), session, blocks)
    parts = dict(line.strip().split(": ", 1) for line in text.splitlines() if line.startswith("    block "))
    for block, words in zip(["1", "2", "3"], ["ahead, not clear: count-0", "clear winner: count-0",
                                             "no model stands out"]):
        assert parts[f"block {block}"].startswith(words), parts
    status, _, whole = verdict(session, "model")
    assert status == "ahead" and whole.startswith("ahead, not clear: count-0")
    assert parts["block 1"].endswith("(protected exceedance 0.54 < 0.95, ahead from 0.50 with 10")  # wrapped
    assert ">= 0.95" in parts["block 2"]


def test_an_invented_control_group_is_not_led_by_a_lookalike(compass):
    # On a memoryless task count-task is count-0. Every participant's guesses are
    # explained equally well by count-0, count-task and count-1 (up to 0.1 nat):
    # the summary must not name a leader, and must say count-task was left out.
    rng = np.random.default_rng(0)
    rows = []
    for p in range(10):
        base = -300.0 + rng.normal(0, 0.1, 2)
        for model, ll in [("count-0", base[0]), ("count-task", base[0]), ("count-1", base[1])]:
            rows.append(dict(participant=f"c{p}", group="control", model=model, loglik=ll, n_params=2,
                             n_trials=400, bic=2 * np.log(400) - 2 * ll, cv_loglik=ll,
                             converged=True, cv_converged=True))
    fits = pd.DataFrame(rows)
    blocks = fits.assign(block=1, bic_block=fits["bic"], cv_loglik_block=np.nan)
    sets = lookalikes([parse_model(m, compass) for m in ["count-0", "count-task", "count-1"]])
    sel = selection(fits, merge=sets)
    text = summary_text(winners(fits, blocks, merge=sets), sel,
                        selection_blocks(blocks, merge=sets, method="variational"), merge=sets)
    assert "count-task left out: identical to count-0 on this task" in text
    assert "ahead" not in text and "clear winner" not in text
    assert "group control (10 participants): no model stands out" in text


def test_convergence_text_counts_failures_and_says_when_cv_could_not_run():
    fits = pd.DataFrame(dict(converged=[True, False, True], cv_converged=[True, None, False]))
    blocks = pd.DataFrame(dict(converged=[True, False, False, True]))
    text = convergence_text(fits, blocks)
    assert "1 of 3 fits" in text and "1 of 3 cross-validations" in text and "2 of 4 block refits" in text
    assert "fewer than two blocks" in text
    ok = convergence_text(fits.assign(converged=True, cv_converged=True), blocks.assign(converged=True))
    assert ok == "optimiser: every fit converged"


def test_probabilities_never_round_onto_zero_or_one():
    # 0.99987 printed as 1.000 would claim certainty the selection does not give
    status, _, words = verdict(_selection([0.99987, 0.00013], 0.0004), "model")
    assert status == "clear" and "protected exceedance > 0.999;" in words and "omnibus risk < 0.001" in words
    assert "1.00" not in words
    assert p_words(0.0004) == "< 0.001" and p_words(0.0123) == "= 0.012" and p_words(0.47) == "= 0.47"
    # neither side of the 0.05 line is rounded onto it
    assert (p_words(0.0496), p_words(0.0504)) == ("= 0.0496", "= 0.0504")


def test_console_lines_stay_under_one_hundred_characters_and_say_terms_in_full():
    rest = lambda top: [top] + [(1 - top) / 9] * 9  # noqa: E731
    blocks = pd.concat([_selection(rest(0.3), 0.2, group="a-rather-long-group-name", block=str(b))
                        for b in range(1, 9)])
    session = _selection(rest(0.3), 0.2, group="a-rather-long-group-name", n=40)
    text = summary_text(_winners([f"count-{i}" for i in range(10)] * 4, ["strong"] * 40,
                                 group="a-rather-long-group-name"), session, blocks, families=None)
    lines = text.splitlines()
    assert max(len(line) for line in lines) <= LINE_WIDTH < 100
    assert "protected exceedance" in text and "omnibus risk" in text
    assert "pxp" not in text and "BOR" not in text


def test_bounds_are_counted_for_the_winning_fits_and_for_all_fits():
    fits = pd.DataFrame(dict(participant=["p1", "p1", "p2", "p2"], model=["count-0", "count-1"] * 2,
                             inv_temp=[1.0, 50.0, 2.0, 1.0], lapse=[0.5, 0.1, 0.5, 0.5],
                             at_bound=["lapse", "inv_temp", "lapse", "lapse"]))
    best = pd.DataFrame(dict(participant=["p1", "p2"], block="all", best_model=["count-1", "count-0"]))
    lines = bound_text(fits, best).splitlines()
    assert lines[0] == ("bounds, the 2 winning fits: inv_temp at its upper bound 50 in 1, lapse at its upper "
                        "bound 0.5 in 1")
    assert lines[1].startswith("bounds, all 4 fits: inv_temp at its upper bound 50 in 1, lapse at its upper bound "
                               "0.5 in 3")
    assert bound_text(fits.assign(at_bound="")) == "bounds, all 4 fits: none at a bound (at_bound in fits.csv)"


def test_a_wrapped_line_never_breaks_a_comparison():
    line = ("  families: clear winner: deep (protected exceedance > 0.999; omnibus risk < 0.001); block 2: "
            "ahead, not clear: count-1 (protected exceedance 0.51 < 0.95; omnibus risk 0.01)")
    for width in range(30, 100):
        text = wrapped(line, width)
        assert " ".join(text.split()) == " ".join(line.split())
        assert "> 0.999" in text and "< 0.001" in text and "0.51 < 0.95" in text, width
        assert all(len(row) <= width for row in text.splitlines() if " " in row.strip())
