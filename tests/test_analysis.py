"""The whole job: foretell.fit and `foretell fit` write the contract tables."""

from __future__ import annotations

import json
from dataclasses import replace
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

import foretell
from foretell.choice import choice_proba
from foretell.cli.main import main
from foretell.errors import UsageError
from foretell.learners import Counting
from foretell.results import Result
from foretell.steps.guesses import FitResult
from foretell.tasks import load_task

TASK_PATH = Path(__file__).resolve().parents[1] / "tasks" / "tide-gauge.toml"
MODELS = ["count-0", "count-1", "count-2", "count-0-leak", "mix-3", "source"]

CONTRACT = {
    "fits": ["participant", "group", "model", "loglik", "n_params", "n_trials", "aic", "bic",
             "cv_loglik", "inv_temp", "lapse", "converged", "message", "at_bound"],
    "blocks": ["participant", "group", "session", "block", "model", "n_trials", "n_params",
               "loglik_session", "loglik_block", "bic_block", "cv_loglik_block", "inv_temp_block",
               "lapse_block", "converged", "cv_converged", "message"],
    "winners": ["participant", "group", "block", "best_model", "runner_up", "criterion", "delta",
                "strength"],
    "selection": ["group", "model", "expected_freq", "exceedance", "protected_exceedance", "omnibus_risk",
                  "freq_concentration", "method", "note"],
    "selection_blocks": ["group", "block", "model", "expected_freq", "exceedance",
                         "protected_exceedance", "omnibus_risk"],
    "families": ["group", "family", "expected_freq", "exceedance", "protected_exceedance", "omnibus_risk"],
    "families_blocks": ["group", "block", "family", "expected_freq", "protected_exceedance", "omnibus_risk"],
    "contexts": ["participant", "block", "context", "n_obs", "leaf_prob", "in_source_tree", "model",
                 "expected_leaf_prob"],
    "context_agreement": ["participant", "block", "source_context", "status", "response_leaf",
                          "expected_status_share", "beyond_model"],
    "excluded": ["participant", "group", "reason"],
}


@pytest.fixture(scope="module")
def study() -> pd.DataFrame:
    """Four simulated participants (depth-0 and depth-1 counting learners), 3 blocks of 80 trials."""
    task = load_task(TASK_PATH)
    rng = np.random.default_rng(11)
    rows = []
    for p in range(4):
        x = task.sample(240, seed=100 + p)
        probs = choice_proba(Counting(depth=p % 2).next_proba(x, 2), 3.0, 0.02)
        guesses = (rng.random(240) > probs[:, 0]).astype(int)
        for t in range(240):
            rows.append({"participant": f"p{p + 1:02d}", "group": "g1" if p < 2 else "g2",
                         "block": t // 80 + 1, "trial": t + 1, "stimulus": task.symbols[x[t]],
                         "response": "" if t == 50 else task.symbols[guesses[t]],
                         "rt": np.nan if t == 50 else 0.4 + 0.1 * rng.random()})
    return pd.DataFrame(rows)


@pytest.fixture(scope="module")
def result(study: pd.DataFrame) -> FitResult:
    return foretell.fit(study, TASK_PATH, models=MODELS, seed=3, n_starts=2)


def test_tables_hold_the_contract_columns(result) -> None:
    tables = result.tables()
    for name, columns in CONTRACT.items():
        assert set(columns) <= set(tables[name].columns), name
    fits = result.fits
    assert set(fits["model"]) == set(MODELS)
    assert len(fits) == 4 * len(MODELS)
    # all models are scored on the same trials: 240 minus warm-up (K = 3) minus one missed guess
    assert fits["n_trials"].nunique() == 1 and fits["n_trials"].iloc[0] == 240 - 3 - 1
    assert set(result.winners["block"]) == {"all", "1", "2", "3"}
    assert set(result.selection["group"]) == {"all", "g1", "g2"}


def test_the_result_follows_the_step_contract(study, result) -> None:
    assert isinstance(result, FitResult) and isinstance(result, Result) and result.step == "fit"
    assert result.model_ids == MODELS and result.task.name == "tide-gauge"
    assert result.texts() == {"summary.txt": result.summary + "\n"}
    json.dumps(result.settings)  # JSON-ready: the manifest records it
    assert result.settings["trials"] == "best"
    best = result.winners.query("block == 'all'")[["participant", "best_model"]]
    trials = result.tables()["trials"]
    assert set(zip(trials["participant"], trials["model"])) == set(best.itertuples(index=False, name=None))
    every = replace(result, settings={**result.settings, "trials": "all"})
    assert len(every.tables()["trials"]) == len(result.predictions)
    assert "trials" not in replace(result, settings={**result.settings, "trials": "none"}).tables()
    assert "trials.csv" in result.files() and "summary.txt" in result.files()
    with pytest.raises(UsageError, match="did you mean 'all'"):
        foretell.fit(study, TASK_PATH, models=MODELS, trials="al")


def test_options_are_checked_before_any_fitting(study) -> None:
    for bad, message in [({"criterion": "aic"}, "criterion must be one of"), ({"n_jobs": 0}, "n_jobs"),
                         ({"seed": -1}, "seed"), ({"n_replicates": 0}, "n_replicates"),
                         ({"context_depth": 99}, "response-tree depth"), ({"models": ["count-x"]}, "count-x")]:
        with pytest.raises(UsageError, match=message):
            foretell.fit(study.iloc[:0], TASK_PATH, **bad)  # an empty log would fail later, as a LogError


def test_a_participant_with_nothing_to_fit_is_named_in_the_notes(study) -> None:
    quiet = study.assign(response=np.where(study["participant"] == "p04", "", study["response"]))
    result = foretell.fit(quiet, TASK_PATH, models=["count-0", "count-1"], seed=np.random.default_rng(5),
                          n_starts=1, n_replicates=2)
    assert result.excluded["participant"].tolist() == ["p04"]
    assert result.notes == ("participant p04 left out: every guess missed",)
    assert isinstance(result.settings["seed"], int)


def test_bic_and_aic_follow_their_definitions(result) -> None:
    # AIC = 2k - 2 ln L (Akaike, 1974); BIC = k ln n - 2 ln L (Schwarz, 1978); from memory.
    f = result.fits
    assert np.allclose(f["aic"], 2 * f["n_params"] - 2 * f["loglik"])
    assert np.allclose(f["bic"], f["n_params"] * np.log(f["n_trials"]) - 2 * f["loglik"])


def test_same_seed_same_tables(study, result) -> None:
    again = foretell.fit(study, TASK_PATH, models=MODELS, seed=3, n_starts=2)
    for name, table in result.tables().items():
        pd.testing.assert_frame_equal(table, again.tables()[name], check_exact=False, rtol=1e-12)


def test_cli_fit_writes_the_directory_atomically(study, tmp_path: Path,
                                                 capsys: pytest.CaptureFixture[str]) -> None:
    log = tmp_path / "study.csv"
    study.to_csv(log, index=False)
    out = tmp_path / "results"
    args = ["fit", str(log), "--task", str(TASK_PATH), "--out", str(out), "--models",
            ",".join(MODELS), "--starts", "1"]
    assert main(args) == 0
    written = {p.name for p in out.iterdir()}
    assert {f"{name}.csv" for name in CONTRACT} <= written and "summary.txt" in written
    assert "group all" in capsys.readouterr().out
    fits = pd.read_csv(out / "fits.csv")
    assert set(fits["model"]) == set(MODELS)
    # a second run refuses to overwrite, and --force replaces
    assert main(args) == 1
    assert "--force" in capsys.readouterr().err
    assert main(args + ["--force"]) == 0


def test_cli_fit_unknown_model_is_reported(study, tmp_path: Path,
                                           capsys: pytest.CaptureFixture[str]) -> None:
    log = tmp_path / "study.csv"
    study.to_csv(log, index=False)
    code = main(["fit", str(log), "--task", str(TASK_PATH), "--out", str(tmp_path / "r"),
                 "--models", "count-0,count-banana"])
    assert code in (1, 2)
    assert "count-banana" in capsys.readouterr().err
    assert not (tmp_path / "r").exists()


def test_summary_reports_convergence(result) -> None:
    assert "optimiser:" in result.summary


def test_demo_fits_and_compares(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    out = tmp_path / "demo"
    assert main(["demo", "--out", str(out), "--jobs", "2", "--skip", "rt,groups,events,report"]) == 0
    text = capsys.readouterr().out
    assert "group rested" in text and "group sleep-restricted" in text
    assert "check against the simulation's truth" in text
    fits = pd.read_csv(out / "fit" / "fits.csv")
    assert fits["participant"].nunique() == 28
    # the demo's two groups differ in how they learn: the family-level selection must see it
    fam = pd.read_csv(out / "fit" / "families.csv").set_index(["group", "family"])["protected_exceedance"]
    assert fam[("rested", "deep")] > 0.9 and fam[("sleep-restricted", "shallow")] > 0.9


def test_analyze_writes_every_step_and_the_report(study, tmp_path: Path,
                                                  capsys: pytest.CaptureFixture[str]) -> None:
    log = tmp_path / "study.csv"
    study.to_csv(log, index=False)
    out = tmp_path / "all"
    code = main(["analyze", str(log), "--task", str(TASK_PATH), "--out", str(out), "--models",
                 "count-0,count-1", "--no-bayes"])
    assert code == 0, capsys.readouterr().err
    for path in ("validation/summary.csv", "fit/fits.csv", "rt/rt_compare.csv", "groups/curves.csv",
                 "events/participants.csv", "report.html", "manifest.json"):
        assert (out / path).is_file(), path
    assert list(out.glob("events/sub-*_task-tidegauge_events.tsv"))
    html = (out / "report.html").read_text()
    assert "Model comparison" in html and "http://" not in html and "<script" not in html
    assert "report.html" in capsys.readouterr().err


@pytest.mark.slow
def test_demo_runs_the_whole_job(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    # the full demo with its posterior sampling (a few minutes); the two tests above cover the same code
    out = tmp_path / "demo"
    assert main(["demo", "--out", str(out), "--jobs", "2"]) == 0
    assert (out / "report.html").is_file() and (out / "rt" / "rt_compare.csv").is_file()
    html = (out / "report.html").read_text()
    assert "Simulated demo data" in html and "command: foretell demo" in html


def test_drifting_choice_determinism_is_not_mistaken_for_a_change_of_model() -> None:
    # Depth-2 learners whose inv_temp rises from 0.3 to 5 over five blocks: per-block refits of every
    # parameter must see the depth-2 learner from block 2 on, and must not call count-0 in block 1.
    task = load_task(TASK_PATH)
    rng = np.random.default_rng(21)
    temps = [0.3, 0.8, 1.5, 3.0, 5.0]
    rows = []
    for p in range(10):
        x = task.sample(500, seed=300 + p)
        pred = Counting(depth=2).next_proba(x, 2)
        for t in range(500):
            probs = choice_proba(pred[t:t + 1], temps[t // 100], 0.02)[0]
            rows.append({"participant": f"d{p:02d}", "block": t // 100 + 1, "trial": t + 1,
                         "stimulus": task.symbols[x[t]],
                         "response": task.symbols[int(rng.random() > probs[0])]})
    result = foretell.fit(pd.DataFrame(rows), task, models=["count-0", "count-1", "count-2"], seed=0, n_starts=2)
    per_block = result.winners[result.winners["block"] != "all"]
    later = per_block[per_block["block"].astype(int) >= 2]
    assert (later["best_model"] == "count-2").mean() > 0.5
    first = per_block[per_block["block"] == "1"]
    called_count0 = (first["best_model"] == "count-0") & first["strength"].isin(["positive", "strong",
                                                                                "very-strong"])
    assert called_count0.mean() < 0.5
