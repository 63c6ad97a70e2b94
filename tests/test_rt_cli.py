"""The rt command's time-on-task baseline and leak-bootstrap options."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from foretell.cli.main import main
from foretell.simulate import simulate_participants
from foretell.steps.measure_fits import LEAK_BOOTSTRAP
from foretell.tasks import load_task


def _log(tmp_path: Path) -> Path:
    log, _ = simulate_participants(load_task("tide-gauge"), 2, 2, models=["count-1"], seed=5, block_length=40)
    path = tmp_path / "study.csv"
    log.assign(rt=np.round(log["rt"], 3)).to_csv(path, index=False)
    return path


def test_baseline_terms_reach_every_model(tmp_path: Path) -> None:
    out = tmp_path / "rt"
    assert main(["rt", str(_log(tmp_path)), "--task", "tide-gauge", "--out", str(out), "--models",
                 "count-0,count-1", "--no-bayes", "--baseline", "blocks,log_trial"]) == 0
    settings = json.loads((out / "manifest.json").read_text())["settings"]
    assert settings["baseline"] == ["blocks", "log_trial"] and settings["bootstrap"] == LEAK_BOOTSTRAP
    fits = pd.read_csv(out / "rt_fits.csv")
    # An intercept and a second block's shift (two blocks), log trial, the residual variance and the
    # AR(1) coefficient; the learner adds its regressor: the parameter count follows the terms asked for.
    assert set(fits.loc[fits["model"] == "none", "n_params"]) == {1 + 1 + 1 + 2}
    assert set(fits.loc[fits["model"] == "count-1", "n_params"]) == {1 + 1 + 1 + 1 + 2}


def test_an_unknown_baseline_term_is_refused_with_a_suggestion(tmp_path: Path, capsys) -> None:
    code = main(["rt", str(_log(tmp_path)), "--task", "tide-gauge", "--out", str(tmp_path / "rt"),
                 "--no-bayes", "--baseline", "blocks,log_trail"])
    err = capsys.readouterr().err
    assert code == 2 and "log_trail" in err and "log_trial" in err
    assert not (tmp_path / "rt").exists()


def test_help_states_the_bootstrap_default(capsys) -> None:
    with pytest.raises(SystemExit):
        main(["rt", "--help"])
    assert f"default {LEAK_BOOTSTRAP}" in " ".join(capsys.readouterr().out.split())
