"""The HTML report: built from a result folder, every number from its tables, self-contained, no scripts."""

from __future__ import annotations

import base64
import html as htmllib
import re
import shutil
from pathlib import Path

import pandas as pd
import pytest

import foretell
from foretell.errors import UsageError
from foretell.logs import log_summary, validate_log
from foretell.outputs import write_outputs
from foretell.report.build import build_report, status_shares, tree_figure
from foretell.simulate import simulate_participants
from foretell.summaries import verdict
from foretell.text import number

PNG_MAGIC = b"\x89PNG\r\n\x1a\n"  # the PNG signature (PNG specification, W3C 2003)
MODELS = ["count-0", "count-1", "count-2"]


def make_study(out: Path, *, groups: bool = True, rt: bool = True, recovery: bool = True) -> Path:
    """Write a tiny analysis folder (validation/, fit/, and optionally rt/, groups/, recovery/) and return it."""
    from foretell.steps.groups import compare_groups
    from foretell.steps.design import recover
    from foretell.steps.measures import analyse_rt

    task = foretell.load_task("tide-gauge")
    frame, _ = simulate_participants(task, 6, 2, groups={"rested": ["count-0", "count-1"],
                                                         "tired": ["count-2", "count-1"]},
                                     seed=3, block_length=50)
    log = validate_log(frame, task)
    result = foretell.fit(log, task, MODELS, seed=0, n_starts=1, n_replicates=3)
    tables = {f"fit/{k}": v for k, v in result.tables("none").items()}
    tables["validation/summary"] = log_summary(log)
    texts = {"fit/summary.txt": result.summary, "validation/warnings.txt": "\n".join(log.warnings)}
    if rt:
        times = analyse_rt(log, task, MODELS, fits=result.fits, bayes=False)
        tables |= {f"rt/{k}": v for k, v in times.tables().items()}
        texts["rt/summary.txt"] = "\n".join(times.notes)
    if groups:
        compared = compare_groups(log, task, result, bayes=False, n_permutations=99)
        tables |= {f"groups/{k}": v for k, v in compared.tables().items()}
    if recovery:
        design = recover(task, ["count-0", "count-1"], n_participants=3, trials=[40], seed=0)
        tables |= {f"recovery/{k}": v for k, v in design.tables().items()}
        texts["recovery/answer.txt"] = design.answer
    return write_outputs(out, tables, texts=texts, manifest={"settings": {"seed": 0}, "demo": True, "draws": 100})


@pytest.fixture(scope="module")
def study(tmp_path_factory) -> Path:
    return make_study(tmp_path_factory.mktemp("report") / "analysis")


@pytest.fixture(scope="module")
def built(study):
    return build_report(study)


def _text(page: str) -> str:
    """Return the page's visible text, tags removed and entities decoded, whitespace collapsed."""
    return " ".join(htmllib.unescape(re.sub(r"<[^>]+>", " ", page)).split())


def test_every_section_is_present_with_its_figures(built):
    page, figures = built
    for key in ("data", "curves", "models", "trees", "rt", "design", "methods", "cautions"):
        assert f'<section id="{key}">' in page
    assert page.count('class="missing"') == 1  # only events/ is absent
    assert "No events/ folder" in page
    assert "seed: 0" in page and "posterior draws per chain: 100" in page  # from manifest.json
    assert {"figures/winners.png", "figures/source_tree.png", "figures/response_tree_rested.png",
            "figures/response_tree_tired.png", "figures/confusion_40.png"} <= set(figures)
    assert any(name.startswith("figures/curve_") for name in figures)
    for name, data in figures.items():
        assert data.startswith(PNG_MAGIC), name
        assert "data:image/png;base64," + base64.b64encode(data).decode("ascii") in page


def test_page_is_self_contained_without_scripts(built):
    page, _ = built
    assert not re.search(r"https?://", page)
    assert "<script" not in page.lower()
    assert re.search(r"<link\b", page) is None
    assert "default-src 'none'; img-src data:; style-src 'unsafe-inline'" in page
    assert all(src.startswith("data:image/png;base64,") for src in re.findall(r'<img src="([^"]*)"', page))


def test_numbers_come_from_the_folder_tables(study, built):
    page = _text(built[0])
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
    page = _text(built[0])
    selection = pd.read_csv(study / "fit" / "selection.csv", dtype={"group": str, "model": str})
    for group, part in selection.groupby("group"):
        status, leader, words = verdict(part, "model")
        assert f"Group {group} (" in page and words in page
    statuses = [verdict(p, "model")[0] for _, p in selection.groupby("group")]
    if "clear" not in statuses:
        assert "clear winner:" not in page


def test_absent_steps_are_said_in_one_line(study, tmp_path):
    only_fit = tmp_path / "only-fit"
    shutil.copytree(study / "fit", only_fit / "fit")
    page, figures = build_report(only_fit)
    for line in ("No groups/ folder", "No rt/ folder", "No recovery/ folder", "No validation/ folder"):
        assert line in page
    assert '<section id="models">' in page and "figures/winners.png" in figures
    assert not any(name.startswith(("figures/curve_", "figures/confusion_")) for name in figures)
    assert "Newey" not in page  # methods only of the steps present


def test_provisional_is_said_at_the_top_and_in_the_bayesian_sections(study, built):
    page, _ = build_report(study, provisional=True, title="Pilot study")
    assert 'id="provisional"' in page and "<title>Pilot study</title>" in page
    top = page.index('id="provisional"')
    assert top < page.index('<section id="data">')
    for key in ("models", "methods"):  # no hierarchical group or RT model ran here: those sections stay plain
        start = page.index(f'<section id="{key}">')
        assert 'class="provisional"' in page[start:page.index("</section>", start)], key
    for key in ("curves", "rt"):
        start = page.index(f'<section id="{key}">')
        assert 'class="provisional"' not in page[start:page.index("</section>", start)], key
    assert 'class="provisional"' not in built[0]


def test_folder_text_is_escaped(study, tmp_path):
    copy = tmp_path / "copy"
    shutil.copytree(study / "validation", copy / "validation")
    (copy / "fit").mkdir()
    pd.DataFrame({"participant": ["p99"], "group": ["tired"], "reason": ["<script>bad()</script>"]}) \
        .to_csv(copy / "fit" / "excluded.csv", index=False)
    page, _ = build_report(copy)
    assert "&lt;script&gt;bad()&lt;/script&gt;" in page and "<script" not in page
    assert "1 participant left out of the model fits" in _text(page)


def test_a_folder_without_steps_is_refused(tmp_path):
    with pytest.raises(UsageError, match="none of the step folders"):
        build_report(tmp_path)
    with pytest.raises(UsageError, match="not a folder"):
        build_report(tmp_path / "nothing")


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
