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
from foretell.outputs import provenance, write, write_outputs
from foretell.plots.report import tree_figure
from foretell.report.build import build_report
from foretell.report.comparison import status_shares
from foretell.report.layout import cell, table
from foretell.findings import findings
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
    return AnalysisResult(task=task, settings={"task": task.name, "seed": 0, "draws": 100, "skip": [],
                                               "steps": {k: dict(v.settings) for k, v in steps.items()}},
                          steps=steps)


def make_study(out: Path, **steps: bool) -> Path:
    """Write a tiny analysis folder as foretell demo writes it, and return it."""
    return write(out, make_analysis(**steps), manifest=provenance("demo", {}, []))


@pytest.fixture(scope="module")
def analysis() -> AnalysisResult:
    return make_analysis()


@pytest.fixture(scope="module")
def study(analysis, tmp_path_factory) -> Path:
    return write(tmp_path_factory.mktemp("report") / "analysis", analysis, manifest=provenance("demo", {}, []))


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
    run = re.search(r'<p class="run">(.*?)</p>', page).group(1)  # from manifest.json and the tables
    assert run.startswith(f"foretell {foretell.__version__} · run 20") and "command: foretell demo" in run
    assert "6 participants, 600 trials · task tide-gauge · seed 0" in run
    assert 'id="demo"' in page and "Simulated demo data" in page
    assert set(built.figures) == {"figures/winners.png", "figures/parameters.png", "figures/source_tree.png",
                                  "figures/response_tree_rested.png", "figures/response_tree_tired.png",
                                  "figures/rt_slopes.png", "figures/rt_binned.png"}
    steps = {name for name in ResultFolder(study).files if "/figures/" in name}
    assert "recovery/figures/confusion_40.png" in steps and any(n.startswith("groups/figures/curve_") for n in steps)
    shown = {**built.figures, **{name: (study / name).read_bytes() for name in steps
                                 if not name.startswith(("recovery/figures/params", "recovery/figures/recovery"))}}
    for name, data in shown.items():  # the steps' figures are embedded as written, not drawn again
        assert data.startswith(PNG_MAGIC), name
        assert "data:image/png;base64," + base64.b64encode(data).decode("ascii") in page, name
    assert page.count("<img ") == len(shown)


def test_the_report_in_memory_is_the_report_of_its_folder(analysis, study, built):
    def body(page: str) -> str:  # the folder's manifest says more about the run: its command, a demo
        return re.sub(r'<p class="(run|demo)".*?</p>', "", page)

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
        assert cell(float(value)) in page
    assert cell(float(selection["omnibus_risk"].iloc[-1])) in page
    compare = pd.read_csv(study / "rt" / "rt_compare.csv")
    assert number(float(compare["bic_sum"].iloc[1]), ".1f") in page
    effects = pd.read_csv(study / "groups" / "group_effects.csv")
    assert f"Holm-corrected p {cell(float(effects['perm_p_holm'].iloc[0]), 'p')}" in _headed(built.html)
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


def test_provisional_is_said_only_over_results_that_rest_on_posterior_draws(study, built, tmp_path):
    import shutil

    page = build_report(study, provisional=True, title="Pilot study").html
    assert "<title>Pilot study</title>" in page
    assert 'class="provisional"' not in page  # no hierarchical model ran: nothing rests on short chains
    copy = Path(shutil.copytree(study, tmp_path / "copy"))
    pd.DataFrame({"metric": ["optimal_rate"], "sampler": ["pymc"], "chains": [2], "draws": [100],
                  "ok": [True], "provisional": [True], "reasons": [""]}).to_csv(
        copy / "groups" / "group_diagnostics.csv", index=False)
    page = build_report(copy, provisional=True).html
    assert page.index('id="provisional"') < page.index("<table")
    for key, expected in (("curves", True), ("models", False), ("rt", False), ("methods", False)):
        start = page.index(f'<section id="{key}">')
        assert ('class="provisional"' in page[start:page.index("</section>", start)]) == expected, key
    assert 'class="provisional"' not in build_report(copy, provisional=False).html


def _headed(page: str) -> str:
    """Return the visible text with each cell prefixed by its column heading ("heading value")."""
    out = []
    for table in re.findall(r"<table>(.*?)</table>", page, flags=re.S):
        heads = re.findall(r"<th[^>]*>(.*?)</th>", table)
        for row in re.findall(r"<tr>(.*?)</tr>", table.split("</thead>")[-1], flags=re.S):
            out += [f"{h} {v}" for h, v in zip(heads, re.findall(r"<td[^>]*>(.*?)</td>", row))]
    return htmllib.unescape(" | ".join(out))


def test_findings_come_first_and_each_links_to_its_evidence(analysis, built):
    page = built.html
    top = page.index('<section id="findings"')
    assert top < page.index("<table") and top < page.index("<img") and top < page.index('<section id="models">')
    links = re.findall(r'<li>[^<]*<a href="#([a-z]+)">\(evidence\)</a></li>', page[top:page.index("</section>", top)])
    assert [f.anchor for f in findings(analysis)] == links and {"models", "curves", "rt"} <= set(links)
    for anchor in set(links):
        assert f'<section id="{anchor}">' in page


def test_contents_list_only_the_sections_present(built):
    nav = built.html[built.html.index("<nav>"):built.html.index("</nav>")]
    assert 'href="#events"' not in nav and 'href="#eeg"' not in nav  # absent here: said in their section only
    assert 'href="#findings"' in nav and 'href="#design"' in nav and 'href="#methods"' in nav


def test_methods_are_a_paragraph_with_this_study_numbers_and_full_references(built):
    start = built.html.index('<section id="methods">')
    methods = _text(built.html[start:built.html.index("</section>", start)])
    assert "6 participants (600 trials)" in methods and "3 learner models (count-0, count-1, count-2)" in methods
    assert "inv_temp [0.01, 50], lapse [0.0001, 0.5]; 1 start per fit" in methods
    assert "The first 2 trials of each session" in methods and "(99 permutations)" in methods
    assert "seed 0" in methods and f"foretell {foretell.__version__}" in methods
    # full references (from memory): authors, year, title, journal
    assert ("Rigoux, L., Stephan, K. E., Friston, K. J. & Daunizeau, J. (2014). Bayesian model selection for "
            "group studies – revisited. NeuroImage, 84, 971–985.") in methods
    assert "Holm, S. (1979). A simple sequentially rejective multiple test procedure." in methods


def test_tables_drop_empty_columns_and_say_a_repeated_value_once():
    frame = pd.DataFrame({"model": ["count-0", "count-1"], "p": [0.00004, 0.3], "empty": [None, None],
                          "n": [14, 14], "share": [0.99987, 0.5]})
    shown = table(frame, {"model": "model", "p": "p", "empty": "empty", "n": "n", "share": "share"}, "T",
                  {"p": "p"})
    assert shown.columns == ("model", "p", "share") and shown.caption == "T; n: 14 on every row"
    assert shown.rows == (("count-0", "< 0.001", "> 0.999"), ("count-1", "0.30", "0.500")) and shown.ids == (0,)


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
        "status": ["distinguished", "merged into shorter", "merged into shorter", "split into longer"],
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
    assert {"*", "up", "down", "up\ndown", "down\ndown"} <= labels  # one symbol per line, oldest first
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


def test_curves_show_each_participant_and_an_interval_even_without_a_model():
    from foretell.curves import METRICS
    from foretell.plots.groups import curve_figure

    curves = pd.DataFrame({"participant": [f"p{i}" for i in range(4) for _ in range(2)], "group": "A",
                           "session": "1", "block": ["1", "2"] * 4, "metric": "median_rt",
                           "value": [0.5, 0.45, 0.6, 0.55, 0.7, 0.6, 0.55, 0.5]})
    table = curves.groupby(["group", "session", "block", "metric"], as_index=False)["value"].mean().rename(
        columns={"value": "participant_mean"}).assign(mean=float("nan"), hdi95_low=float("nan"),
                                                      hdi95_high=float("nan"))
    fig = curve_figure(table, METRICS["median_rt"], curves=curves, seed=1)
    ax = fig.axes[0]
    assert len([line for line in ax.lines if line.get_linewidth() < 1]) == 4  # one thin line per participant
    legend = [t.get_text() for t in fig.legends[0].get_texts()]  # below the axes, never squeezing them
    assert legend == ["A: mean of participants", "A: 95% bootstrap interval over participants"]
    band = ax.collections[0].get_paths()[0].vertices[:, 1]
    low, high = band.min(), band.max()
    assert 450 <= low < 525 <= high <= 700  # in ms, around the mean of 587.5 and 525 ms
    assert ax.get_ylabel() == "median RT (ms)"
    assert all("10^" not in t.get_text() and "times" not in t.get_text() for t in ax.get_yticklabels())
    rate = curve_figure(table.assign(metric="optimal_rate"), METRICS["optimal_rate"], chance=1 / 3).axes[0]
    assert rate.get_ylim()[0] == 0 and rate.get_ylabel() == "optimal-guess rate (share of trials)"
    assert any(t.get_text() == "chance" for t in rate.texts)


def test_winners_cells_without_a_winner_are_grey_and_groups_are_set_apart():
    from foretell.plots.report import winners_heatmap

    winners = pd.DataFrame({"participant": ["p1", "p2", "p1", "p2"], "group": ["b", "a", "b", "a"],
                            "session": "1", "block": ["1", "1", "all", "all"],
                            "best_model": ["count-0", "count-1", "count-0", "count-1"],
                            "strength": ["bare-mention", "strong", "positive", "very-strong"]})
    ax = winners_heatmap(winners).axes[0]
    assert [t.get_text() for t in ax.get_yticklabels()] == ["p2", "p1"]  # group a first
    grid = ax.images[0].get_array()
    assert grid.mask[1, 0] and not grid.mask[1, 1]  # p1's bare lead in block 1 names no winner: grey
    assert {"a", "b"} <= {t.get_text() for t in ax.texts}
    assert "no winner" in [t.get_text() for t in ax.get_legend().get_texts()]


def test_tree_labels_sit_on_a_ground_above_the_edges_and_leaves_show_probabilities():
    from foretell.plots.common import smallest_font

    fig = tree_figure(["up", "up-down", "down-down"], {}, title="t", probs={"up": "up 0.20\ndown 0.80"})
    ax = fig.axes[0]
    labels = [t for t in ax.texts if t.get_text() in {"*", "up", "down", "up\ndown", "down\ndown"}]
    assert len(labels) == 5 and all(t.get_zorder() > max(line.get_zorder() for line in ax.lines) for t in labels)
    assert all(t.get_bbox_patch() is not None for t in labels)
    assert "up 0.20\ndown 0.80" in {t.get_text() for t in ax.texts}
    assert fig.get_figwidth() <= 7.4 and smallest_font(fig) >= 9
