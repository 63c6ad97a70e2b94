"""The findings: plain-words lines read from an analysis's tables, each linked to the section of its evidence."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from foretell.errors import UsageError
from foretell.findings import findings, findings_text
from foretell.folders import ResultFolder
from foretell.outputs import write_outputs
from foretell.summaries import LINE_WIDTH, contrast_words, p_words


def _selection(group: str, pxp: list[float], risk: float, models: list[str], **extra) -> pd.DataFrame:
    return pd.DataFrame(dict(group=group, model=models, expected_freq=np.nan, exceedance=np.nan,
                             protected_exceedance=pxp, omnibus_risk=risk, freq_concentration=np.nan,
                             n_participants=8, criterion="bic", method="variational", note="", **extra))


def _tables() -> dict[str, pd.DataFrame]:
    """Tables of an invented two-group study: tired guessers lose 20 points of optimal guesses in every block."""
    models = ["count-0", "count-1", "mix-3"]
    joint = pd.DataFrame(dict(
        contrast="tired-rested", group="tired", reference="rested", metric=["optimal_rate", "depth", "optimal_rate"],
        scale=["share of trials", "symbols back", "share of trials per block"],
        summary=["mean over blocks", "mean over blocks", "learning slope"], method="permutation over participants",
        estimate=[-0.2, 0.1, -0.01], low=[-0.3, -0.2, -0.03], high=[-0.1, 0.4, 0.01], level=0.95,
        prob_positive=np.nan, perm_p=[0.0002, 0.4, 0.3], perm_p_holm=[0.0004, 0.8, 0.6], n_group=4,
        n_reference=4, n_blocks=3, called=np.nan, note=""))
    effects = pd.DataFrame(dict(
        contrast="tired-rested", group="tired", reference="rested", session="1", block=["1", "2", "3"],
        metric="optimal_rate", scale="share of trials", n_group=4, n_reference=4,
        observed_diff=[-0.15, -0.2, -0.25], perm_p=0.001, perm_p_holm=[0.003, 0.003, 0.003]))
    return {
        "fit/selection": pd.concat([_selection("rested", [0.97, 0.02, 0.01], 0.01, models),
                                    _selection("tired", [0.4, 0.35, 0.25], 0.3, models)]),
        "groups/group_joint": joint, "groups/group_effects": effects,
        "rt/rt_selection": pd.concat([_selection("all", [0.8, 0.1, 0.1], 0.02, ["count-1", "mix-3", "none"],
                                                 called=[True, False, False])]),
        "events/participants": pd.DataFrame(dict(participant=["p1", "p2"], session="1",
                                                 bids_label=["p1", "p2"], bids_session="1")),
    }


def _folder(path, tables) -> ResultFolder:
    settings = {"seed": 0, "steps": {"groups": {"n_permutations": 999}, "rt": {"measure": "rt"}}}
    return ResultFolder(write_outputs(path, tables, manifest={"step": "analyze", "settings": settings}))


@pytest.fixture
def tables():
    return _tables()


def test_each_step_gives_its_lines_linked_to_its_section(tmp_path, tables):
    found = findings(_folder(tmp_path / "a", tables))
    anchors = [f.anchor for f in found]
    assert anchors == ["models", "models", "curves", "curves", "rt", "events"]
    models = {f.text.split(":")[0]: f.text for f in found if f.anchor == "models"}
    assert "clear winner: count-0" in models["Models, group rested (8 participants)"]
    assert "no model stands out" in models["Models, group tired (8 participants)"]
    differences = [f.text for f in found if f.anchor == "curves"]
    assert differences[0].startswith(f"Groups, optimal-guess rate ({contrast_words('tired', 'rested')}): "
                                     "−20.0 points over blocks (95% interval −30.0 to −10.0)")
    assert f"Holm p {p_words(0.0004)} (999 permutations)" in differences[0]
    assert "lower in all 3 blocks, each at Holm p < 0.05" in differences[0]
    assert differences[1].startswith("Groups: no difference shown") and "context depth" in differences[1]
    assert "count-1 is called over the baseline" in found[4].text
    assert found[5].text.startswith("Event files: 2 events.tsv files")


def test_a_changed_table_changes_its_line(tmp_path, tables):
    before = findings(_folder(tmp_path / "before", tables))
    tables["groups/group_joint"].loc[0, ["estimate", "perm_p_holm"]] = [-0.35, 0.02]
    tables["groups/group_effects"].loc[2, ["observed_diff", "perm_p_holm"]] = [0.05, 0.2]
    tables["fit/selection"].loc[tables["fit/selection"]["group"] == "rested", "protected_exceedance"] = [
        0.7, 0.2, 0.1]
    after = findings(_folder(tmp_path / "after", tables))
    changed = {a.text for a in after} - {b.text for b in before}
    assert any("ahead, not clear: count-0" in line for line in changed)
    assert any("−35.0 points over blocks" in line and "Holm p = 0.020" in line
               and "lower in 2 of 3 blocks, 2 at Holm p < 0.05" in line for line in changed)
    tables["groups/group_joint"].loc[0, "perm_p_holm"] = 0.07
    quiet = [f.text for f in findings(_folder(tmp_path / "quiet", tables)) if f.anchor == "curves"]
    assert quiet == ["Groups: no difference shown (Holm p ≥ 0.05) in optimal-guess rate, context depth "
                     "(a difference not shown is not shown to be absent)."]


def test_no_learner_is_called_when_the_selection_calls_none(tmp_path, tables):
    tables["rt/rt_selection"]["called"] = False
    tables["rt/rt_selection"]["protected_exceedance"] = [0.4, 0.3, 0.3]
    line = next(f.text for f in findings(_folder(tmp_path / "a", tables)) if f.anchor == "rt")
    assert line.startswith("Reaction times, everyone: no learner is called; no model stands out")


def test_console_lines_stay_under_one_hundred_characters(tmp_path, tables):
    text = findings_text(_folder(tmp_path / "a", tables))
    assert text.startswith("findings:\n- Models, group rested")
    assert max(len(line) for line in text.splitlines()) <= LINE_WIDTH < 100
    assert text.count("\n- ") == len(findings(tmp_path / "a"))


def test_an_analysis_without_steps_has_no_findings_and_other_objects_are_refused(tmp_path):
    empty = write_outputs(tmp_path / "empty", {"validation/summary": pd.DataFrame({"participant": ["all"]})})
    assert findings(empty) == ()
    with pytest.raises(UsageError, match="AnalysisResult"):
        findings(42)


def test_a_failed_hierarchical_model_is_said_with_what_it_means(tmp_path, tables):
    tables["groups/group_diagnostics"] = pd.DataFrame({"metric": ["optimal_rate", "median_rt"], "ok": [False, True],
                                                       "reasons": ["R-hat 1.020 > 1.01", ""]})
    lines = [f.text for f in findings(_folder(tmp_path / "a", tables)) if f.anchor == "curves"]
    assert lines[-1] == ("Groups: the hierarchical model failed its diagnostics for optimal-guess rate (R-hat 1.020 > "
                         "1.01); those metrics have no model intervals, and their differences rest on the permutation "
                         "tests alone.")
    tables["groups/group_diagnostics"]["ok"] = True
    assert not any("failed its diagnostics" in f.text for f in findings(_folder(tmp_path / "b", tables)))
