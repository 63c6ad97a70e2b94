"""The command line: exit codes, messages, and the thin commands."""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

import pytest

from foretell.cli.main import main

TASKS = Path(__file__).resolve().parents[1] / "tasks"


def test_help_shows_examples(capsys: pytest.CaptureFixture[str]) -> None:
    with pytest.raises(SystemExit) as exit_:
        main(["--help"])
    assert exit_.value.code == 0
    assert "examples:" in capsys.readouterr().out


@pytest.mark.parametrize("command", ["demo", "task", "check", "fit"])
def test_subcommand_help_shows_an_example(command: str, capsys: pytest.CaptureFixture[str]) -> None:
    with pytest.raises(SystemExit):
        main([command, "--help"])
    assert "example" in capsys.readouterr().out


def test_usage_error_exits_2(capsys: pytest.CaptureFixture[str]) -> None:
    with pytest.raises(SystemExit) as exit_:
        main(["fit"])
    assert exit_.value.code == 2  # argparse convention (POSIX utility conventions; common practice)


def test_task_describes_the_source(capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["task", str(TASKS / "tide-gauge.toml")]) == 0
    out = capsys.readouterr().out
    assert "entropy rate" in out and "up-down" in out


def test_bad_task_is_one_line_per_problem(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    bad = tmp_path / "bad.toml"
    bad.write_text('name = "b"\nsymbols = ["a", "b"]\n[[contexts]]\npast = ["a"]\n'
                   'next = {a = 0.5, b = 0.6}\n[[contexts]]\npast = ["b"]\nnext = {a = 2.0, b = -1.0}\n')
    assert main(["task", str(bad)]) == 1
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 2 and all(line.startswith(f"error: {bad}") for line in err)
    assert "Traceback" not in "".join(err)


def _log(tmp_path: Path, rows: list[str], name: str = "log.csv") -> Path:
    path = tmp_path / name
    path.write_text("participant,block,trial,stimulus,response,rt\n" + "\n".join(rows) + "\n")
    return path


def test_check_prints_the_summary(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    log = _log(tmp_path, ["p01,1,1,up,down,0.41", "p01,1,2,down,,", "p01,2,3,up,up,0.05"])
    before = log.read_bytes()
    assert main(["check", str(log), "--task", str(TASKS / "tide-gauge.toml")]) == 0
    out = capsys.readouterr().out
    assert "p01" in out and "RT screen: floor 0.15 s" in out
    assert log.read_bytes() == before  # inputs are never modified


def test_check_bad_log_names_file_line_column(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    log = _log(tmp_path, ["p01,1,1,up,down,0.41", "p01,1,2,sideways,up,abc"])
    assert main(["check", str(log), "--task", str(TASKS / "tide-gauge.toml")]) == 1
    err = capsys.readouterr().err
    assert f"{log}:3: column 'stimulus'" in err and f"{log}:3: column 'rt'" in err
    assert "Traceback" not in err


def test_check_maps_columns_and_units(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    path = tmp_path / "lab.tsv"
    path.write_text("subj\tblock\ttrial\tstimulus\tguess\tRT_ms\np01\t1\t1\tup\tdown\t412\n")
    code = main(["check", str(path), "--task", str(TASKS / "tide-gauge.toml"), "--map", "participant=subj",
                 "--map", "response=guess", "--map", "rt=RT_ms", "--rt-unit", "ms"])
    assert code == 0, capsys.readouterr().err


def test_bad_map_is_a_usage_error(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    log = _log(tmp_path, ["p01,1,1,up,down,0.41"])
    assert main(["check", str(log), "--task", str(TASKS / "tide-gauge.toml"), "--map", "oops"]) == 2
    assert "canonical=theirs" in capsys.readouterr().err


def test_zero_jobs_is_a_usage_error(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    log = _log(tmp_path, ["p01,1,1,up,down,0.41"])
    with pytest.raises(SystemExit) as exit_:
        main(["fit", str(log), "--task", str(TASKS / "tide-gauge.toml"), "--out", str(tmp_path / "r"),
              "--jobs", "0"])
    assert exit_.value.code == 2 and "0 jobs" in capsys.readouterr().err


def test_existing_output_is_refused_before_any_work(tmp_path: Path, capsys: pytest.CaptureFixture[str],
                                                     monkeypatch: pytest.MonkeyPatch) -> None:
    import foretell.steps.guesses

    def no_fit(*args, **kwargs):
        raise AssertionError("fitting must not start when the output cannot be written")

    monkeypatch.setattr(foretell.steps.guesses, "fit", no_fit)
    out = tmp_path / "results"
    out.mkdir()
    (out / "old.csv").write_text("x\n")
    log = _log(tmp_path, ["p01,1,1,up,down,0.41"])
    assert main(["fit", str(log), "--task", str(TASKS / "tide-gauge.toml"), "--out", str(out)]) == 1
    assert "--force" in capsys.readouterr().err
    blocked = tmp_path / "afile"
    blocked.write_text("")
    assert main(["fit", str(log), "--task", str(TASKS / "tide-gauge.toml"), "--out", str(blocked / "sub")]) == 1
    assert "not a folder" in capsys.readouterr().err


def test_task_by_shipped_name(capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["task", "compass-fair"]) == 0
    assert "task 'compass-fair'" in capsys.readouterr().out


# --- data safety and plain messages --------------------------------------------------------

def _study(tmp_path: Path, folder: str = "full") -> Path:
    """A small valid log of two tide-gauge participants, written into tmp_path/folder."""
    import numpy as np

    from foretell.simulate import simulate_participants
    from foretell.tasks import load_task

    log, _ = simulate_participants(load_task("tide-gauge"), 2, 2, models=["count-1"], seed=5,
                                   block_length=40)
    path = tmp_path / folder / "study.csv"
    path.parent.mkdir(parents=True, exist_ok=True)
    log.assign(rt=np.round(log["rt"], 3)).to_csv(path, index=False)
    return path


def test_version(capsys: pytest.CaptureFixture[str]) -> None:
    import foretell

    with pytest.raises(SystemExit) as exit_:
        main(["--version"])
    assert exit_.value.code == 0 and capsys.readouterr().out.strip() == f"foretell {foretell.__version__}"


def test_fit_help_lists_models_and_task_help_names_shipped_tasks(capsys) -> None:
    with pytest.raises(SystemExit):
        main(["fit", "--help"])
    out = capsys.readouterr().out
    assert "count-K-leak" in out and "mix-D" in out and "default set" in out and "inv_temp" in out
    with pytest.raises(SystemExit):
        main(["task", "--help"])
    assert "shipped" in capsys.readouterr().out


def test_force_with_the_input_in_the_output_folder_loses_nothing(tmp_path: Path, capsys) -> None:
    # The tester's case: `fit full/study.csv --out full --force` deleted study.csv and keep.txt.
    log = _study(tmp_path)
    (log.parent / "keep.txt").write_text("mine")
    before = {p.name: p.read_bytes() for p in log.parent.iterdir()}
    assert main(["fit", str(log), "--task", "tide-gauge", "--out", str(log.parent), "--force"]) == 1
    assert "holds the input" in capsys.readouterr().err
    assert {p.name: p.read_bytes() for p in log.parent.iterdir()} == before


@pytest.mark.parametrize("out", [".", "", ".."])
def test_current_empty_and_parent_output_folders_are_refused(tmp_path: Path, monkeypatch, capsys,
                                                             out: str) -> None:
    log = _study(tmp_path, "data/inner")
    monkeypatch.chdir(log.parent)
    assert main(["fit", "study.csv", "--task", "tide-gauge", "--out", out, "--force"]) == 1
    assert "Traceback" not in capsys.readouterr().err
    assert sorted(p.name for p in log.parent.iterdir()) == ["study.csv"]


def test_fit_writes_manifest_and_inputs_stay_unchanged(tmp_path: Path, capsys) -> None:
    import hashlib
    import json

    log = _study(tmp_path)
    digest = hashlib.sha256(log.read_bytes()).hexdigest()
    out = tmp_path / "res"
    assert main(["fit", str(log), "--task", "tide-gauge", "--out", str(out), "--models",
                 "count-0,count-1", "--seed", "4", "--trials", "none"]) == 0
    assert hashlib.sha256(log.read_bytes()).hexdigest() == digest  # inputs are never modified
    manifest = json.loads((out / "manifest.json").read_text())
    assert manifest["inputs"][str(log)] == digest and manifest["options"]["seed"] == 4
    assert manifest["foretell_version"] and "numpy" in manifest["packages"]
    assert not (out / "trials.csv").exists()
    # the same command and seed give byte-identical tables
    again = tmp_path / "res2"
    assert main(["fit", str(log), "--task", "tide-gauge", "--out", str(again), "--models",
                 "count-0,count-1", "--seed", "4", "--trials", "none"]) == 0
    for table in out.glob("*.csv"):
        assert (again / table.name).read_bytes() == table.read_bytes(), table.name


@pytest.mark.parametrize("args, message", [
    (["--seed", "-1"], ">= 0"),
    (["--models", "count-01,count-1"], "listed twice"),
    (["--models", "count-13"], "at most 12"),
])
def test_bad_fit_options_are_one_line_usage_errors(tmp_path: Path, capsys, args, message) -> None:
    log = _study(tmp_path)
    try:
        code = main(["fit", str(log), "--task", "tide-gauge", "--out", str(tmp_path / "r"), *args])
    except SystemExit as exit_:
        code = exit_.code
    err = capsys.readouterr().err
    assert code == 2 and message in err and "Traceback" not in err
    assert not (tmp_path / "r").exists()


def test_fit_shows_the_logs_warnings(tmp_path: Path, capsys) -> None:
    log = _study(tmp_path)
    text = log.read_text().splitlines()
    log.write_text("\n".join([text[0] + ",email"] + [line + ",x@y" for line in text[1:]]) + "\n")
    assert main(["fit", str(log), "--task", "tide-gauge", "--out", str(tmp_path / "r"),
                 "--models", "count-0"]) == 0
    err = capsys.readouterr().err
    assert err.count("personal data") == 1


def test_sigterm_leaves_no_output_and_no_worker(tmp_path: Path) -> None:
    # Interrupting a parallel fit (POSIX SIGTERM) must leave nothing behind: no folder, no
    # partial folder, no child process.
    import os
    import signal
    import subprocess
    import time

    from foretell.demo import demo_log

    log = tmp_path / "demo.csv"
    demo_log().to_csv(log, index=False)
    out = tmp_path / "res"
    proc = subprocess.Popen([sys.executable, "-m", "foretell.cli.main", "fit", str(log), "--task",
                             "lantern-relay", "--out", str(out), "--jobs", "2"],
                            stderr=subprocess.PIPE, stdout=subprocess.PIPE, start_new_session=True)
    time.sleep(6)
    children = _children(proc.pid)
    proc.send_signal(signal.SIGTERM)
    _, err = proc.communicate(timeout=60)
    assert proc.returncode == 128 + signal.SIGTERM, err.decode()
    assert b"Traceback" not in err
    assert list(tmp_path.iterdir()) == [log]
    time.sleep(1)
    alive = [pid for pid in children if _alive(pid)]
    for pid in alive:
        os.kill(pid, signal.SIGKILL)
    assert alive == []


def _children(pid: int) -> list[int]:
    import subprocess

    out = subprocess.run(["ps", "-o", "pid=", "--ppid", str(pid)], capture_output=True, text=True)
    return [int(p) for p in out.stdout.split()]


def _alive(pid: int) -> bool:
    import os

    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    try:  # a zombie is dead
        with open(f"/proc/{pid}/stat") as fh:
            return fh.read().split()[2] != "Z"
    except OSError:
        return False


def test_recover_writes_tables_figures_and_the_answer(tmp_path: Path, capsys) -> None:
    out = tmp_path / "design"
    assert main(["recover", "--task", "tide-gauge", "--participants", "4", "--trials", "80",
                 "--models", "count-0,count-1", "--out", str(out)]) == 0
    assert "Design check" in capsys.readouterr().out
    written = {p.relative_to(out).as_posix() for p in out.rglob("*") if p.is_file()}
    assert {"confusion.csv", "inversion.csv", "params.csv", "recovery_summary.csv", "group_check.csv",
            "answer.txt", "manifest.json", "figures/recovery.png", "figures/confusion_80.png"} <= written
    assert (out / "figures" / "recovery.png").read_bytes()[:4] == b"\x89PNG"


def test_recover_from_fits_and_its_bad_inputs(tmp_path: Path, capsys) -> None:
    log = _study(tmp_path)
    fit_out = tmp_path / "res"
    assert main(["fit", str(log), "--task", "tide-gauge", "--out", str(fit_out), "--models",
                 "count-0,count-1", "--trials", "none"]) == 0
    assert main(["recover", "--task", "tide-gauge", "--participants", "3", "--trials", "60",
                 "--models", "count-0,count-1", "--from-fits", str(fit_out), "--out",
                 str(tmp_path / "d")]) == 0
    capsys.readouterr()
    assert main(["recover", "--task", "tide-gauge", "--participants", "3", "--trials", "6O",
                 "--models", "count-0", "--out", str(tmp_path / "e")]) == 2
    assert "--trials" in capsys.readouterr().err
    assert main(["recover", "--task", "tide-gauge", "--participants", "3", "--trials", "60",
                 "--models", "count-0", "--from-fits", str(tmp_path), "--out", str(tmp_path / "f")]) == 1
    assert f"{tmp_path}: no manifest.json: not a folder foretell wrote" in capsys.readouterr().err


def test_reaction_design_source_not_given_and_fit_refused(tmp_path: Path, capsys) -> None:
    assert main(["task", "keypad-chase"]) == 0
    assert "source not given" in capsys.readouterr().out
    log = tmp_path / "srt.csv"
    log.write_text("participant,block,trial,stimulus,response,rt\n"
                   + "".join(f"p01,1,{t},north,north,0.4{t % 10}\n" for t in range(1, 30)))
    code = main(["fit", str(log), "--task", "keypad-chase", "--out", str(tmp_path / "r")])
    err = capsys.readouterr().err.strip().splitlines()
    assert code == 2 and len(err) == 1 and "reaction design" in err[0]
    assert main(["check", str(log), "--task", "keypad-chase"]) == 0


def test_rt_models_another_measure_column(tmp_path: Path, capsys) -> None:
    import numpy as np
    import pandas as pd

    log = _study(tmp_path)
    frame = pd.read_csv(log, keep_default_na=False, na_values={"rt": [""]})
    frame["p3_amp"] = np.random.default_rng(0).normal(5.0, 1.0, len(frame)).round(3)
    frame.to_csv(log, index=False)
    out = tmp_path / "p3"
    assert main(["rt", str(log), "--task", "tide-gauge", "--out", str(out), "--measure", "p3_amp",
                 "--locked", "reveal", "--models", "count-0,count-1", "--no-bayes"]) == 0
    assert {"p3_amp_fits.csv", "p3_amp_compare.csv", "regressors.csv"} <= {p.name for p in out.iterdir()}
    err = capsys.readouterr().err.splitlines()
    assert not any("not part of the log format" in line and "p3_amp" in line for line in err)


def test_a_task_deeper_than_the_learners_limit_is_refused_before_fitting(tmp_path: Path, capsys) -> None:
    past = ['"a"'] * 13
    lines = ['name = "deep-chain"', 'symbols = ["a", "b"]']
    for d in range(1, 14):
        lines += ["[[contexts]]", "past = [" + ", ".join(['"b"'] + ['"a"'] * (d - 1)) + "]",
                  "next = { a = 0.6, b = 0.4 }"]
    lines += ["[[contexts]]", "past = [" + ", ".join(past) + "]", "next = { a = 0.1, b = 0.9 }"]
    task = tmp_path / "deep.toml"
    task.write_text("\n".join(lines) + "\n")
    assert main(["task", str(task)]) == 0
    log = tmp_path / "log.csv"
    log.write_text("participant,block,trial,stimulus,response\n"
                   + "".join(f"p01,1,{t},a,b\n" for t in range(1, 40)))
    capsys.readouterr()
    assert main(["fit", str(log), "--task", str(task), "--out", str(tmp_path / "r")]) == 2
    err = [line for line in capsys.readouterr().err.strip().splitlines() if not line.startswith("warning:")]
    assert len(err) == 1 and "at most 12 back" in err[0] and "Traceback" not in err[0]
    assert not (tmp_path / "r").exists()


def test_analyse_is_accepted_and_help_lists_analyze_only(capsys) -> None:
    with pytest.raises(SystemExit):
        main(["--help"])
    listing = capsys.readouterr().out
    assert "analyze" in listing and "analyse " not in listing
    with pytest.raises(SystemExit) as exit_:
        main(["analyse", "--help"])
    assert exit_.value.code == 0 and "foretell analyze" in capsys.readouterr().out


@pytest.mark.parametrize("command", [["demo"], ["fit", "l.csv", "--task", "t", "--out", "o"],
                                     ["analyze", "l.csv", "--task", "t", "--out", "o"],
                                     ["rt", "l.csv", "--task", "t", "--out", "o"],
                                     ["groups", "l.csv", "--task", "t", "--out", "o"],
                                     ["recover", "--task", "t", "--participants", "2", "--trials", "9",
                                      "--models", "count-0", "--out", "o"]])
def test_every_command_runs_one_job_unless_told(command) -> None:
    from foretell.cli.parser import build_parser

    assert build_parser().parse_args(command).jobs == 1


def test_the_demo_says_which_steps_run() -> None:
    from foretell.demo import demo_plan, demo_task

    line = demo_plan(demo_task(), ["fit", "report"])
    assert "fits" not in line and "report" not in line and "running: validation, reaction times" in line
    assert "fits and comparisons" in demo_plan(demo_task())


def test_messages_give_command_line_advice(tmp_path: Path, capsys) -> None:
    from foretell.cli.commands import cli_words

    assert cli_words("pass rt_unit='ms' (CLI: --rt-unit ms)") == "pass --rt-unit ms"
    log = tmp_path / "lab.csv"
    log.write_text("participant,block,trial,stimulus,guess\np01,1,1,up,down\n")
    assert main(["check", str(log), "--task", "tide-gauge"]) == 1
    err = capsys.readouterr().err
    assert "--map response=" in err and "columns=" not in err


def _recover_folder(tmp_path: Path) -> Path:
    """A folder as foretell recover writes it (tables only: enough for the checks before any work)."""
    import pandas as pd

    from foretell.folders import RECOVERY_TABLES, fingerprints
    from foretell.outputs import write_outputs
    from foretell.tasks import load_task

    tables = {name: pd.DataFrame({"trials": [60]}) for name in RECOVERY_TABLES}
    return write_outputs(tmp_path / "design", tables, texts={"answer.txt": "enough\n"},
                         manifest={"step": "recover", **fingerprints(load_task("tide-gauge"))})


def test_a_folder_that_is_read_is_an_input_of_the_run(tmp_path: Path, capsys) -> None:
    log, design = _study(tmp_path), _recover_folder(tmp_path)
    before = {p.name: p.read_bytes() for p in design.iterdir()}
    common = ["analyze", str(log), "--task", "tide-gauge", "--recovery", str(design), "--force", "--skip",
              "fit,rt,groups,events,report"]  # refused before any work; nothing long even if not
    assert main([*common, "--out", str(design)]) == 1
    assert "holds the input" in capsys.readouterr().err
    assert main([*common, "--out", str(design / "inside")]) == 1
    assert "lies inside" in capsys.readouterr().err
    assert {p.name: p.read_bytes() for p in design.iterdir()} == before
    assert main(["rt", str(log), "--task", "tide-gauge", "--fits", str(design), "--out", str(tmp_path / "r")]) == 1
    assert "a foretell recover output, not the output folder of foretell fit" in capsys.readouterr().err


def test_a_design_check_of_another_task_is_refused(tmp_path: Path, capsys) -> None:
    design = _recover_folder(tmp_path)
    log = tmp_path / "compass.csv"
    log.write_text("participant,block,trial,stimulus,response\n"
                   + "".join(f"p01,1,{t},n,s\n" for t in range(1, 30)))
    code = main(["analyze", str(log), "--task", "compass-fair", "--recovery", str(design), "--out",
                 str(tmp_path / "r"), "--skip", "fit,rt,groups,events,report"])
    assert code == 1 and "made on another task, not 'compass-fair'" in capsys.readouterr().err


def test_a_misspelt_task_name_or_model_id_gets_a_did_you_mean(tmp_path: Path, capsys) -> None:
    assert main(["task", "tide-gaueg"]) == 1
    err = capsys.readouterr().err
    assert err.startswith("error: tide-gaueg: ") and err.rstrip().endswith("(did you mean 'tide-gauge'?)")
    assert main(["task", "nothing-like-it"]) == 1  # nothing close: the list of shipped tasks instead
    assert "did you mean" not in (err := capsys.readouterr().err) and "tide-gauge" in err
    log = _log(tmp_path, ["p01,1,1,up,down,0.41", "p01,1,2,down,up,0.5"])
    out = tmp_path / "f"
    assert main(["fit", str(log), "--task", "tide-gauge", "--models", "count-1,cuont-2", "--out", str(out)]) == 2
    err = capsys.readouterr().err
    assert "unknown model 'cuont-2'" in err and err.rstrip().endswith("(did you mean 'count-2'?)")


def test_check_ends_with_a_verdict(tmp_path: Path, capsys) -> None:
    rows = [f"p01,1,{t},up,down,0.41" for t in range(1, 21)] + ["p02,1,1,down,up,0.5"]
    assert main(["check", str(_log(tmp_path, rows)), "--task", "tide-gauge"]) == 0
    last = capsys.readouterr().out.rstrip().splitlines()[-1]
    assert last == "verdict: the log is ready to analyse (2 participants, 21 trials; 1 with nothing to fit, left out)"
    assert main(["check", str(_log(tmp_path, rows[-1:], name="one.csv")), "--task", "tide-gauge"]) == 0
    assert capsys.readouterr().out.rstrip().splitlines()[-1].startswith("verdict: nothing to analyse")
    bad = _log(tmp_path, ["p01,1,1,up,down,0.41", "p01,1,2,sideways,up,abc"], name="bad.csv")
    assert main(["check", str(bad), "--task", "tide-gauge"]) == 1
    captured = capsys.readouterr()
    assert captured.out.rstrip().splitlines() == ["verdict: 2 problems, fix them first"]
    assert captured.err.count("error: ") == 2


def _subcommands():
    from foretell.cli.parser import build_parser

    parser = build_parser()
    (sub,) = [a for a in parser._actions if isinstance(a, argparse._SubParsersAction)]
    return sub.choices


def test_every_help_shows_every_default_and_a_description(capsys) -> None:
    for name, parser in _subcommands().items():
        text = " ".join(parser.format_help().split())
        assert parser.description and parser.description in text, name
        for action in parser._actions:
            unset = action.default in (None, False, "", [], argparse.SUPPRESS)
            if action.option_strings and not unset and action.help:
                shown = " ".join(parser._get_formatter()._expand_help(action).split())
                assert "default" in shown, (name, action.option_strings)
    demo = _subcommands()["demo"].format_help()
    assert "--seed" in demo and "(default: 0)" in demo and "the demo data stay the same" in " ".join(demo.split())


def test_batch_jobs_get_plain_progress_lines(tmp_path: Path, capsys) -> None:
    ups = ["up", "down", "down", "up", "up", "down"]
    rows = [f"p0{p},1,{t},{ups[t % 6]},{ups[(t + p) % 6]},0.4" for p in (1, 2) for t in range(1, 31)]
    code = main(["fit", str(_log(tmp_path, rows)), "--task", "tide-gauge", "--models", "count-0,count-1",
                 "--out", str(tmp_path / "f")])
    err = capsys.readouterr().err
    assert code == 0, err
    assert "[foretell] fit: 2/2 participants fitted\n" in err and "\r" not in err  # stderr is not a terminal here


def test_notes_are_wrapped_to_short_lines(capsys) -> None:
    from foretell.cli.commands import WIDTH, say_notes

    words = "the hierarchical model of optimal_rate was not called (R-hat 1.04 > 1.01), so the curves have no"
    say_notes([words + " intervals from it; pass rt_unit='ms' (CLI: --rt-unit ms)", "short"])
    lines = capsys.readouterr().err.splitlines()
    assert all(len(line) <= WIDTH < 100 for line in lines) and len(lines) == 3
    assert lines[0].startswith("note: the hierarchical") and lines[1].startswith("  ") and lines[2] == "note: short"
    assert " ".join(line.strip() for line in lines[:2]).endswith("intervals from it; pass --rt-unit ms")
