"""Corrupted logs and task files: every command succeeds or fails with one line per problem.

Property-based (hypothesis; MacIver et al., 2019): start from a valid log or task file, corrupt
it in the ways files from many labs are corrupted, and run the command-line entry point.
"""

from __future__ import annotations

import string
from pathlib import Path

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from foretell.cli.main import main

TASKS = Path(__file__).resolve().parents[1] / "tasks"
HEADER = ["participant", "group", "block", "trial", "stimulus", "response", "rt"]
ROWS = [["p01", "a", "1", str(t), s, r, "0.41"]
        for t, (s, r) in enumerate([("up", "down"), ("down", "down"), ("up", ""), ("down", "up"),
                                    ("down", "down"), ("up", "up")], start=1)]
ROWS += [["p02", "b", str(1 + t // 3), str(t + 1), s, r, "512"]
         for t, (s, r) in enumerate([("up", "up"), ("up", "down"), ("down", "down"), ("down", "up"),
                                     ("up", "up"), ("down", "down")])]
TASK_TEXT = (TASKS / "tide-gauge.toml").read_text()
WEIRD = ["", "nan", "inf", "-inf", "1e400", "99999999999999999999", "\x00", "\"", "'", "é", "\ufeff",
         "up ", "UP", "-1", "1.5", "all", " ", ";", "\t", "\x1b[31m", "12abc"]


def corrupt_rows(draw) -> list[list[str]]:
    rows = [list(HEADER)] + [list(r) for r in ROWS]
    for _ in range(draw(st.integers(1, 4))):
        kind = draw(st.sampled_from(["cell", "drop_col", "rename_col", "swap_cols", "dup_row",
                                     "drop_rows", "short_row"]))
        if not rows:
            break
        ncol = len(rows[0])
        if kind == "cell" and len(rows) > 1:
            i = draw(st.integers(1, len(rows) - 1))
            j = draw(st.integers(0, max(len(rows[i]) - 1, 0)))
            rows[i][j:j + 1] = [draw(st.sampled_from(WEIRD) | st.text(string.printable, max_size=6))]
        elif kind == "drop_col" and ncol > 1:
            j = draw(st.integers(0, ncol - 1))
            rows = [r[:j] + r[j + 1:] for r in rows]
        elif kind == "rename_col":
            j = draw(st.integers(0, ncol - 1))
            rows[0][j] = draw(st.sampled_from(["Participant", "blocks", "guess", "RT_ms", "", "trial"]))
        elif kind == "swap_cols" and ncol > 1:
            a, b = draw(st.integers(0, ncol - 1)), draw(st.integers(0, ncol - 1))
            rows = [r[:] for r in rows]
            for r in rows[1:]:
                if max(a, b) < len(r):
                    r[a], r[b] = r[b], r[a]
        elif kind == "dup_row" and len(rows) > 1:
            rows.append(rows[draw(st.integers(1, len(rows) - 1))][:])
        elif kind == "drop_rows":
            rows = rows[:draw(st.integers(0, len(rows)))]
        elif kind == "short_row" and len(rows) > 1:
            i = draw(st.integers(1, len(rows) - 1))
            rows[i] = rows[i][:draw(st.integers(0, ncol))]
    return rows


@st.composite
def corrupted_log(draw) -> bytes:
    rows = corrupt_rows(draw)
    delimiter = draw(st.sampled_from([",", ",", ",", ";", "\t"]))
    text = "\n".join(delimiter.join(r) for r in rows) + ("\n" if rows else "")
    encoding = draw(st.sampled_from(["utf-8", "utf-8", "utf-8-sig", "latin-1", "utf-16"]))
    try:
        data = text.encode(encoding)
    except UnicodeEncodeError:
        data = text.encode("utf-8")
    if draw(st.booleans()) and data:
        pos = draw(st.integers(0, len(data)))
        data = data[:pos] + draw(st.binary(min_size=1, max_size=4)) + data[pos:]
    return data


@st.composite
def corrupted_task(draw) -> bytes:
    text = TASK_TEXT
    edits = [("0.25", draw(st.sampled_from(["nan", "inf", "-0.25", "1.25", "\"x\"", "[0.25]", "0.2"]))),
             ('symbols = ["up", "down"]', draw(st.sampled_from(
                 ['symbols = [["up"], ["down"]]', 'symbols = ["up"]', 'symbols = ["up", "up"]',
                  'symbols = ["u-p", "down"]', 'symbols = []', 'symbols = "up"']))),
             ('past = ["up"]', draw(st.sampled_from(['past = [["up"]]', 'past = ["left"]', "past = 3",
                                                     'past = ["up", "up", "up"]']))),
             ("[[contexts]]", draw(st.sampled_from(["[[contexts]", "[contexts]", "[[contexts]]", "[[contexs]]",
                                                    "[[Contexts]]"]))),
             ("block_length = 100", draw(st.sampled_from(["block_lenght = 100", "Block_length = 100",
                                                          'block_length = 100\nsymbol = "up"']))),
             ("next = { up = 0.25", draw(st.sampled_from(["nxt = { up = 0.25", "next = { up = 0.25",
                                                          "past2 = []\nnext = { up = 0.25"])))]
    for old, new in draw(st.lists(st.sampled_from(edits), min_size=1, max_size=3)):
        text = text.replace(old, new, 1)
    data = draw(st.sampled_from([b"", b"\xef\xbb\xbf"])) + text.encode("utf-8")  # with or without a BOM
    if draw(st.booleans()):
        data = data[: draw(st.integers(0, len(data)))]
    return data


def _assert_clean(code: int, err: str) -> None:
    assert "Traceback" not in err
    if code != 0:
        lines = [line for line in err.splitlines() if line.strip()]
        # warnings, their wrapped continuation lines and plain progress lines ("[foretell] ...") are not problems
        problems = [line for line in lines if not line.startswith(("warning:", "  ", "[foretell] "))]
        assert problems, err
        assert all(line.startswith(("error: ", "foretell ")) for line in problems), err


@settings(max_examples=120, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(data=corrupted_log())
def test_check_on_corrupted_logs(tmp_path: Path, capsys, data: bytes) -> None:
    path = tmp_path / "log.csv"
    path.write_bytes(data)
    code = main(["check", str(path), "--task", "tide-gauge"])
    _assert_clean(code, capsys.readouterr().err)
    assert path.read_bytes() == data  # inputs are never modified


@settings(max_examples=80, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(data=corrupted_task())
def test_task_on_corrupted_task_files(tmp_path: Path, capsys, data: bytes) -> None:
    path = tmp_path / "task.toml"
    path.write_bytes(data)
    code = main(["task", str(path)])
    _assert_clean(code, capsys.readouterr().err)


KEY = st.text(string.ascii_letters + "_", min_size=1, max_size=12)


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(key=KEY, where=st.sampled_from(["first line", "before the contexts", "in a context"]),
       table=st.integers(0, 2))
def test_unknown_keys_in_task_files_are_refused_at_their_line(tmp_path: Path, capsys, key: str, where: str,
                                                               table: int) -> None:
    from foretell.taskfile import CONTEXT_KEYS, KEYS

    if key in (CONTEXT_KEYS if where == "in a context" else KEYS):
        return
    lines = TASK_TEXT.splitlines()
    tables = [i for i, text in enumerate(lines) if text.startswith("[[contexts]]")]
    at = {"first line": 0, "before the contexts": tables[0], "in a context": tables[table] + 1}[where]
    lines.insert(at, f"{key} = 1")
    path = tmp_path / "task.toml"
    path.write_text("\n".join(lines) + "\n")
    code = main(["task", str(path)])
    err = capsys.readouterr().err
    _assert_clean(code, err)
    assert code == 1 and f"{path}:{at + 1}:1: " in err and f"unknown key '{key}'" in err


@settings(max_examples=15, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(data=corrupted_log())
def test_fit_on_corrupted_logs_leaves_no_partial_output(tmp_path: Path, capsys, data: bytes) -> None:
    path = tmp_path / "in" / "log.csv"
    path.parent.mkdir(exist_ok=True)
    path.write_bytes(data)
    out = tmp_path / "out"
    if out.exists():
        import shutil
        shutil.rmtree(out)
    code = main(["fit", str(path), "--task", "tide-gauge", "--out", str(out), "--models",
                 "count-0,count-1", "--starts", "1"])
    _assert_clean(code, capsys.readouterr().err)
    leftovers = [p.name for p in tmp_path.iterdir() if p.name not in ("in", "out")]
    assert leftovers == []  # never a partial output folder
    assert out.exists() == (code == 0)


@pytest.mark.parametrize("command", [
    ["rt", "--no-bayes", "--models", "count-0,count-1"],
    ["events", "--models", "count-0,count-1"],
    ["groups", "--no-bayes", "--models", "count-0,count-1"],
    ["analyze", "--models", "count-0,count-1", "--skip", "rt,groups,report"],
])
@settings(max_examples=8, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(data=corrupted_log())
def test_other_commands_on_corrupted_logs(tmp_path: Path, capsys, command, data: bytes) -> None:
    import shutil

    path = tmp_path / "in" / "log.csv"
    path.parent.mkdir(exist_ok=True)
    path.write_bytes(data)
    out = tmp_path / "out"
    shutil.rmtree(out, ignore_errors=True)
    code = main([command[0], str(path), "--task", "tide-gauge", "--out", str(out), *command[1:]])
    _assert_clean(code, capsys.readouterr().err)
    assert [p.name for p in tmp_path.iterdir() if p.name not in ("in", "out")] == []
    assert out.exists() == (code == 0)
    assert path.read_bytes() == data
