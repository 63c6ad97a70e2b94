"""The command line: exit codes, messages, and the thin commands."""

from __future__ import annotations

from pathlib import Path

import pytest

from foretell.cli import main

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
    import foretell.analysis

    def no_fit(*args, **kwargs):
        raise AssertionError("fitting must not start when the output cannot be written")

    monkeypatch.setattr(foretell.analysis, "fit", no_fit)
    out = tmp_path / "results"
    out.mkdir()
    (out / "old.csv").write_text("x\n")
    log = _log(tmp_path, ["p01,1,1,up,down,0.41"])
    assert main(["fit", str(log), "--task", str(TASKS / "tide-gauge.toml"), "--out", str(out)]) == 1
    assert "--force" in capsys.readouterr().err
    blocked = tmp_path / "afile"
    blocked.write_text("")
    assert main(["fit", str(log), "--task", str(TASKS / "tide-gauge.toml"), "--out", str(blocked / "sub")]) == 1
    assert "not a directory" in capsys.readouterr().err


def test_task_by_shipped_name(capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["task", "compass-fair"]) == 0
    assert "task 'compass-fair'" in capsys.readouterr().out
