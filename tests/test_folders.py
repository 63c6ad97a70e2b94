"""Reading result folders back, and reusing earlier fits only where they belong to this task and log."""

from __future__ import annotations

import hashlib
import json
from pathlib import Path

import pandas as pd
import pytest

import foretell
from foretell.errors import InputError, OutputError, UsageError
from foretell.outputs import check_output_dir
from foretell.folders import (RECOVERY_TABLES, ResultFolder, as_fit, as_recovery, fingerprints,
                              step_folder, task_sha256)
from foretell.logs import validate_log
from foretell.outputs import write, write_outputs
from foretell.simulate import simulate_participants
from foretell.tasks import Task

MODELS = ["count-0", "count-1"]


@pytest.fixture(scope="module")
def study(tmp_path_factory):
    """A fit of three tide-gauge participants, in memory and written as foretell fit writes it."""
    task = foretell.load_task("tide-gauge")
    frame, _ = simulate_participants(task, 3, 2, models=["count-1"], seed=4, block_length=30)
    frame["participant"] = frame["participant"].map({"p01": "007", "p02": "008", "p03": "009"})
    log = validate_log(frame, task)
    result = foretell.fit(log, task, models=MODELS, seed=0, n_starts=1, n_replicates=2, trials="all")
    folder = write(tmp_path_factory.mktemp("folders") / "fit", result, manifest=fingerprints(task, log))
    return task, frame, log, result, folder


def test_task_fingerprint_is_the_content_not_the_name(study):
    task = study[0]
    renamed = Task(name="another-name", symbols=task.symbols, contexts=task.contexts, next_probs=task.next_probs)
    assert task_sha256(renamed) == task_sha256(task)
    probs = task.next_probs.copy()
    probs[0] = probs[0][::-1]
    assert task_sha256(Task(name=task.name, symbols=task.symbols, contexts=task.contexts,
                            next_probs=probs)) != task_sha256(task)


def test_log_fingerprints_follow_each_participant(study):
    task, frame, log = study[:3]
    changed = frame.copy()
    row = changed.index[(changed["participant"] == "008") & (changed["response"] != "")][0]
    changed.loc[row, "response"] = "up" if changed.loc[row, "response"] == "down" else "down"
    before, after = fingerprints(task, log), fingerprints(task, validate_log(changed, task))
    assert before["log_sha256"] != after["log_sha256"]
    assert {p for p in before["participants_sha256"]
            if before["participants_sha256"][p] != after["participants_sha256"][p]} == {"008"}
    rows = log.frame[log.frame["participant"] == "007"].reindex(
        columns=["participant", "group", "session", "block", "trial", "stimulus", "response"])
    text = rows.astype(object).fillna("").to_csv(index=False, lineterminator="\n")  # the documented recipe
    assert before["participants_sha256"]["007"] == hashlib.sha256(text.encode()).hexdigest()


def test_result_folder_reads_its_manifest_and_keeps_labels_as_text(study):
    folder = ResultFolder(study[4])
    assert folder.step == "fit" and folder.settings["models"] == MODELS
    fits = folder.table("fits")
    assert fits["participant"].tolist()[:2] == ["007", "007"]  # not the number 7
    assert folder.table("no-such-table") is None and folder.text("summary.txt").startswith(
        study[3].summary.splitlines()[0])
    assert "fits.csv" in folder.files and "manifest.json" not in folder.files


def test_result_folder_refuses_what_foretell_did_not_write(tmp_path):
    with pytest.raises(InputError, match="not a folder"):
        ResultFolder(tmp_path / "nowhere")
    (tmp_path / "mine").mkdir()
    with pytest.raises(InputError, match="no manifest.json"):
        ResultFolder(tmp_path / "mine")
    (tmp_path / "mine" / "manifest.json").write_text(json.dumps({"tool": "other"}))
    with pytest.raises(InputError, match="not a foretell manifest"):
        ResultFolder(tmp_path / "mine")


def test_a_fit_folder_rebuilds_the_fit_result(study):
    task, _, log, result, folder = study
    again = as_fit(folder, log, task)
    assert again.notes == result.notes
    for name in ("fits", "blocks", "winners", "selection", "contexts", "context_agreement"):
        mine, theirs = getattr(again, name), getattr(result, name)
        assert list(mine.columns) == list(theirs.columns) and len(mine) == len(theirs), name
    pd.testing.assert_series_equal(again.fits["loglik"], result.fits["loglik"], check_exact=True)  # floats exact
    assert len(again.predictions) == len(result.predictions) and again.model_ids == MODELS
    assert as_fit(None, log, task) is None and as_fit(result, log, task) is result


def test_an_analyze_output_is_read_through_its_fit_subfolder(study, tmp_path):
    task, _, log, result, _ = study
    tables = {f"fit/{name}": table for name, table in result.tables().items()}
    out = write_outputs(tmp_path / "whole", tables, texts={"fit/summary.txt": result.summary + "\n"},
                        manifest={"step": "analyze", "settings": {"steps": {"fit": dict(result.settings)}},
                                  **fingerprints(task, log)})
    for given in (out, out / "fit"):
        folder = step_folder(given, "fit")
        assert folder.step == "fit" and folder.settings["models"] == MODELS
        assert as_fit(given, log, task).notes == ()
    with pytest.raises(InputError, match="no recovery/ folder"):
        as_recovery(out, task)


def test_fits_of_another_task_are_refused(study):
    task, frame, _, _, folder = study
    other = foretell.load_task("compass-fair")
    with pytest.raises(InputError, match="made on another task"):
        as_fit(folder, None, other)
    with pytest.raises(UsageError, match="FitResult"):
        as_fit(frame, None, task)


def test_fits_of_participants_not_in_the_log_are_dropped_with_a_note(study):
    task, frame, _, _, folder = study
    fewer = validate_log(frame[frame["participant"] != "009"], task)
    again = as_fit(folder, fewer, task)
    assert set(again.fits["participant"]) == set(again.blocks["participant"]) == {"007", "008"}
    assert set(again.predictions["participant"]) == {"007", "008"}
    assert any("1 fitted participant not in this log" in n and "009" in n for n in again.notes)


def test_fits_made_on_another_log_say_which_participants_match(study):
    task, frame, _, _, folder = study
    changed = frame.copy()
    row = changed.index[(changed["participant"] == "008") & (changed["response"] != "")][0]
    changed.loc[row, "response"] = "up" if changed.loc[row, "response"] == "down" else "down"
    again = as_fit(folder, validate_log(changed, task), task)
    assert any("made on another log" in n and "2 participants match it (007, 009)" in n and "008" in n
               for n in again.notes)
    strangers = validate_log(frame.assign(participant="x" + frame["participant"]), task)
    with pytest.raises(InputError, match="none of its 3 fitted participants"):
        as_fit(folder, strangers, task)


def test_a_header_only_fits_table_is_refused(study, tmp_path):
    task, _, log, result, _ = study
    empty = {name: table.iloc[:0] for name, table in result.tables().items()}
    folder = write_outputs(tmp_path / "empty", empty, manifest={"step": "fit", **fingerprints(task, log)})
    with pytest.raises(InputError, match=r"fits.csv: holds no fits \(header only\)"):
        as_fit(folder, log, task)


def test_an_output_inside_a_folder_that_is_read_is_refused(study, tmp_path):
    folder = study[4]
    with pytest.raises(OutputError, match="lies inside"):
        check_output_dir(Path(folder) / "rt", inputs=[folder])
    check_output_dir(tmp_path / "elsewhere", inputs=[folder])


def test_a_recover_folder_rebuilds_the_design_check_of_its_task_only(study, tmp_path):
    task = study[0]
    tables = {name: pd.DataFrame({"trials": [40], "fraction": [0.5]}) for name in RECOVERY_TABLES}
    folder = write_outputs(tmp_path / "design", tables, texts={"answer.txt": "enough trials\n"},
                           manifest={"step": "recover", "settings": {"models": MODELS}, **fingerprints(task)})
    design = as_recovery(folder, task)
    assert design.answer == "enough trials" and design.settings["models"] == MODELS
    assert list(design.tables()) == list(RECOVERY_TABLES) and as_recovery(design, task) is design
    with pytest.raises(InputError, match="made on another task"):
        as_recovery(folder, foretell.load_task("compass-fair"))
    with pytest.raises(InputError, match="a foretell fit output, not the output folder of foretell recover"):
        as_recovery(study[4], task)
