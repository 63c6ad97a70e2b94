"""The HTML report: built in memory or from a result folder, every number from the tables, self-contained."""

from __future__ import annotations

import base64
import html as htmllib
import re
from pathlib import Path

import pandas as pd
import pytest

import foretell
from foretell.errors import InputError, UsageError
from foretell.folders import ResultFolder
from foretell.logs import log_summary, unscorable, validate_log
from foretell.outputs import write, write_outputs
from foretell.plots.report import tree_figure
from foretell.report.build import build_report
from foretell.report.comparison import status_shares
from foretell.simulate import simulate_participants
from foretell.steps.whole import AnalysisResult, ValidationResult
from foretell.summaries import verdict
from foretell.text import number

PNG_MAGIC = b"\x89PNG\r\n\x1a\n"  # the PNG signature (PNG specification, W3C 2003)
MODELS = ["count-0", "count-1", "count-2"]


def make_analysis(*, groups: bool = True, rt: bool = True, recovery: bool = True) -> AnalysisResult:
    """Return a tiny analysis (validation, fit, and optionally rt, groups, recovery), steps run one by one."""
    from foretell.steps.design import recover
    from foretell.steps.measures import analyze_rt

    task = foretell.load_task("tide-gauge")
    frame, _ = simulate_participants(task, 6, 2, groups={"rested": ["count-0", "count-1"],
                                                         "tired": ["count-2", "count-1"]},
                                     seed=3, block_length=50)
    log = validate_log(frame, task)
    result = foretell.fit(log, task, models=MODELS, seed=0, n_starts=1, n_replicates=3, trials="none")
    steps = {"validation": ValidationResult(task=task, summary=log_summary(log), warnings=log.warnings,
                                            unscorable=unscorable(log, 2)),
             "fit": result}
    if rt:
        steps["rt"] = analyze_rt(log, task, models=MODELS, fit=result, bayes=False)
    if groups:
        from foretell.steps.groups import compare_groups

        steps["groups"] = compare_groups(log, task, fit=result, bayes=False, n_permutations=99)
    if recovery:
        steps["recovery"] = recover(task, models=["count-0", "count-1"], n_participants=3, trial_counts=[40],
                                    seed=0)
    return AnalysisResult(task=task, settings={"task": task.name, "seed": 0, "draws": 100, "skip": []},
                          steps=steps)


def make_study(out: Path, **steps: bool) -> Path:
    """Write a tiny analysis folder as foretell analyze writes it, and return it."""
    return write(out, make_analysis(**steps), manifest={"demo": True})


@pytest.fixture(scope="module")
def analysis() -> AnalysisResult:
    return make_analysis()


@pytest.fixture(scope="module")
def study(analysis, tmp_path_factory) -> Path:
    return write(tmp_path_factory.mktemp("report") / "analysis", analysis, manifest={"demo": True})


@pytest.fixture(scope="module")
def built(study):
    return build_report(study)


def _text(page: str) -> str:
    """Return the page's visible text, tags removed and entities decoded, whitespace collapsed."""
    return " ".join(htmllib.unescape(re.sub(r"<[^>]+>", " ", page)).split())


def test_every_section_is_present_with_its_figures(study, built):
    page = built.html
    for key in ("data", "curves", "models", "trees", "rt", "design", "methods", "cautions"):
        assert f'<section id="{key}">' in page
    assert page.count('class="missing"') == 2  # only events/ and eeg/ are absent
    assert "No events/ folder" in page
    assert "seed: 0" in page and "posterior draws per chain: 100" in page  # from manifest.json
    assert set(built.figures) == {"figures/winners.png", "figures/source_tree.png",
                                  "figures/response_tree_rested.png", "figures/response_tree_tired.png"}
    steps = {name for name in ResultFolder(study).files if "/figures/" in name}
    assert "recovery/figures/confusion_40.png" in steps and any(n.startswith("groups/figures/curve_") for n in steps)
    shown = {**built.figures, **{name: (study / name).read_bytes() for name in steps
                                 if not name.startswith(("recovery/figures/params", "recovery/figures/recovery"))}}
    for name, data in shown.items():  # the steps' figures are embedded as written, not drawn again
        assert data.startswith(PNG_MAGIC), name
        assert "data:image/png;base64," + base64.b64encode(data).decode("ascii") in page, name
    assert page.count("<img ") == len(shown)


def test_the_report_in_memory_is_the_report_of_its_folder(analysis, study, built):
    def body(page: str) -> str:  # the run line differs: the folder's manifest says more about the run
        return re.sub(r'<p class="run">.*?</p>', "", page)

    mine = build_report(analysis)
    assert body(mine.html) == body(built.html)
    assert mine.figures == built.figures
    assert analysis.report is None or analysis.report.html == mine.html


def test_page_is_self_contained_without_scripts(built):
    page = built.html
    assert not re.search(r"https?://", page)
    assert "<script" not in page.lower()
    assert re.search(r"<link\b", page) is None
    assert "default-src 'none'; img-src data:; style-src 'unsafe-inline'" in page
    assert all(src.startswith("data:image/png;base64,") for src in re.findall(r'<img src="([^"]*)"', page))


def test_numbers_come_from_the_folder_tables(study, built):
    page = _text(built.html)
    summary = pd.read_csv(study / "validation" / "summary.csv", dtype={"participant": str})
    n_people = int((summary["participant"] != "all").sum())
    assert f"The log holds {n_people} participants" in page
    total = summary[summary["participant"] == "all"].iloc[0]
    assert f"{int(total['trials'])} trials, of which {int(total['missed'])} missed guesses" in page
    selection = pd.read_csv(study / "fit" / "selection.csv")
    for value in selection["protected_exceedance"].iloc[[0, 4, -1]]:
        assert number(float(value), ".3f") in page
    assert number(float(selection["bor"].iloc[-1]), ".3f") in page
    compare = pd.read_csv(study / "rt" / "rt_compare.csv")
    assert number(float(compare["bic_sum"].iloc[1]), ".1f") in page
    effects = pd.read_csv(study / "groups" / "group_effects.csv")
    assert number(float(effects["perm_p_holm"].iloc[0]), ".3f") in page
    answer = (study / "recovery" / "answer.txt").read_text(encoding="utf-8").strip()
    assert " ".join(answer.split()) in page


def test_leaders_are_named_only_as_the_summary_rule_does(study, built):
    page = _text(built.html)
    selection = pd.read_csv(study / "fit" / "selection.csv", dtype={"group": str, "model": str})
    for group, part in selection.groupby("group"):
        status, leader, words = verdict(part, "model")
        assert f"Group {group} (" in page and words in page
    statuses = [verdict(p, "model")[0] for _, p in selection.groupby("group")]
    if "clear" not in statuses:
        assert "clear winner:" not in page


def test_absent_steps_are_said_in_one_line(analysis):
    only_fit = AnalysisResult(task=analysis.task, settings={}, steps={"fit": analysis.fit})
    report = build_report(only_fit)
    for line in ("No groups/ folder", "No rt/ folder", "No recovery/ folder", "No validation/ folder"):
        assert line in report.html
    assert '<section id="models">' in report.html and "figures/winners.png" in report.figures
    assert "curve_" not in report.html and "confusion_" not in report.html
    assert "Newey" not in report.html  # methods only of the steps present


def test_provisional_is_said_at_the_top_and_in_the_bayesian_sections(study, built):
    page = build_report(study, provisional=True, title="Pilot study").html
    assert 'id="provisional"' in page and "<title>Pilot study</title>" in page
    top = page.index('id="provisional"')
    assert top < page.index('<section id="data">')
    for key in ("models", "methods"):  # no hierarchical group or RT model ran here: those sections stay plain
        start = page.index(f'<section id="{key}">')
        assert 'class="provisional"' in page[start:page.index("</section>", start)], key
    for key in ("curves", "rt"):
        start = page.index(f'<section id="{key}">')
        assert 'class="provisional"' not in page[start:page.index("</section>", start)], key
    assert 'class="provisional"' not in built.html


def test_folder_text_is_escaped(study, tmp_path):
    tables = {"validation/summary": pd.read_csv(study / "validation" / "summary.csv"),
              "fit/excluded": pd.DataFrame({"participant": ["p99"], "group": ["tired"],
                                            "reason": ["<script>bad()</script>"]})}
    copy = write_outputs(tmp_path / "copy", tables, texts={"validation/warnings.txt": ""})
    page = build_report(copy).html
    assert "&lt;script&gt;bad()&lt;/script&gt;" in page and "<script" not in page
    assert "1 participant left out of the model fits" in _text(page)


def test_a_folder_without_steps_is_refused(tmp_path):
    with pytest.raises(InputError, match="no manifest.json"):
        build_report(tmp_path)
    with pytest.raises(UsageError, match="not a folder"):
        build_report(tmp_path / "nothing")
    empty = write_outputs(tmp_path / "empty", {"other": pd.DataFrame({"x": [1]})})
    with pytest.raises(UsageError, match="none of the step folders"):
        build_report(empty)


def test_status_shares_count_participants_by_hand():
    whole = pd.DataFrame({
        "group": ["g"] * 3 + ["h"], "source_context": ["up"] * 3 + ["up"], "depth": [1] * 4,
        "status": ["distinguished", "merged", "merged", "split-deeper"],
        "expected_status_share": [0.6, 0.3, 0.9, 0.2], "beyond_model": [False, True, False, False]})
    contexts = pd.DataFrame({
        "group": ["g", "g", "g", "h"], "session": ["all"] * 4, "block": ["all"] * 4,
        "context": ["up"] * 4, "in_source_tree": [True] * 4,
        "expected_distinguished": [0.5, 0.0, 1.0, 0.0], "expected_merged": [0.5, 1.0, 0.0, 0.0],
        "expected_split_deeper": [0.0, 0.0, 0.0, 1.0]})
    out = status_shares(whole, contexts).set_index("group")
    assert out.loc["g", "distinguished"] == pytest.approx(1 / 3)
    assert out.loc["g", "merged"] == pytest.approx(2 / 3)
    assert out.loc["g", "n_participants"] == 3 and out.loc["g", "beyond_model"] == 1
    assert out.loc["g", "expected_status_share"] == pytest.approx(0.6)
    assert out.loc["g", "model_distinguished"] == pytest.approx(0.5)
    assert out.loc["h", "split_deeper"] == 1.0 and out.loc["h", "model_split_deeper"] == 1.0


def test_tree_figure_draws_every_suffix_of_the_contexts():
    fig = tree_figure(["up", "up-down", "down-down"], {}, title="t")
    labels = {t.get_text() for t in fig.axes[0].texts}
    assert {"*", "up", "down", "up-down", "down-down"} <= labels
    assert len(fig.axes[0].lines) == 4  # edges: * to up, * to down, down to up-down, down to down-down


def test_analyze_runs_the_steps_in_turn_and_writes_each_figure_once(tmp_path):
    import hashlib

    from foretell.folders import as_fit

    task = foretell.load_task("tide-gauge")
    frame, _ = simulate_participants(task, 6, 2, groups={"rested": ["count-0"], "tired": ["count-1"]},
                                     seed=8, block_length=40)
    out = tmp_path / "whole"
    result = foretell.analyze(frame, task, out=out, models=["count-0", "count-1"], bayes=False,
                              skip=["events"], progress=False)
    assert list(result.steps) == ["validation", "fit", "rt", "groups"]
    assert result.settings["skip"] == ["events"] and result.settings["steps"]["fit"]["models"] == MODELS[:2]
    folder = ResultFolder(out)
    assert folder.step == "analyze" and folder.fingerprint("task_sha256") and folder.fingerprint("log_sha256")
    pngs = [name for name in folder.files if name.endswith(".png")]
    assert any(name.startswith("groups/figures/curve_") for name in pngs) and "figures/winners.png" in pngs
    digests = [hashlib.sha256(folder.bytes(name)).hexdigest() for name in pngs]
    assert len(set(digests)) == len(digests)  # no figure written twice
    assert folder.text("report.html") == result.report_html
    assert as_fit(out, validate_log(frame, task), task).notes == result.fit.notes
