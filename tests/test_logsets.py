"""Tests of logs in many files: folders, globs, name patterns, and what many files can get wrong."""

from __future__ import annotations

from pathlib import Path

import pandas as pd
import pytest

from foretell.errors import LogError, UsageError
from foretell.inputs import as_log
from foretell.logs import load_log
from foretell.logsets import find_log_files, name_regex

CANONICAL = Path(__file__).resolve().parents[1] / "examples" / "profiles" / "canonical.csv"


@pytest.fixture(scope="module")
def table() -> pd.DataFrame:
    return pd.read_csv(CANONICAL, dtype=str, keep_default_na=False)


@pytest.fixture(scope="module")
def whole(lantern):
    return load_log(CANONICAL, lantern)


def split(table: pd.DataFrame, folder: Path, name: str = "{p}_s{s}.csv", drop=()) -> list[Path]:
    """Write one file per participant and session (the columns in ``drop`` left out); return them."""
    folder.mkdir(exist_ok=True)
    paths = []
    for (p, s), rows in table.groupby(["participant", "session"]):
        path = folder / name.format(p=p, s=s)
        rows.drop(columns=list(drop)).to_csv(path, index=False)
        paths.append(path)
    return paths


def test_a_folder_a_glob_and_one_file_give_the_same_log(tmp_path, table, whole, lantern):
    paths = split(table, tmp_path / "data")
    (tmp_path / "data" / "notes.md").write_text("not a log\n")
    from_folder = load_log(tmp_path / "data", lantern)
    from_glob = load_log(str(tmp_path / "data" / "*_s*.csv"), lantern)
    for log in (from_folder, from_glob):
        pd.testing.assert_frame_equal(log.frame, whole.frame)
        assert log.sources == tuple(str(p) for p in sorted(paths))
    assert from_folder.source == str(tmp_path / "data") and whole.sources == (str(CANONICAL),)


def test_files_are_read_in_the_order_of_their_paths(tmp_path, table):
    folder = tmp_path / "data"
    folder.mkdir()
    for name in ("c.csv", "a.csv", "b.csv"):
        table.head(2).assign(participant=name[0]).to_csv(folder / name, index=False)
    files, _, _ = find_log_files(folder)
    assert [f.path.name for f in files] == ["a.csv", "b.csv", "c.csv"]


def test_inputs_as_log_reads_a_folder_unchanged(tmp_path, table, whole, lantern):
    split(table, tmp_path / "data")
    pd.testing.assert_frame_equal(as_log(tmp_path / "data", lantern).frame, whole.frame)


def test_ids_come_from_the_file_names(tmp_path, table, whole, lantern):
    split(table, tmp_path / "data", name="lab_{p}_ses-{s}_2024.csv", drop=["participant", "session"])
    (tmp_path / "data" / "lab_summary.csv").write_text("x\n1\n")
    log = load_log(tmp_path / "data", lantern, name_pattern="lab_{participant}_ses-{session}_*.csv")
    pd.testing.assert_frame_equal(log.frame, whole.frame)
    assert len(log.sources) == 6
    assert any(f"1 file of {tmp_path / 'data'} does not fit the name pattern" in w and "'lab_summary.csv'" in w
               for w in log.warnings)
    assert any("participant and session from the file names (6 files" in m for m in log.mapped)


def test_a_pattern_that_matches_no_file_is_one_line(tmp_path, table, lantern):
    split(table, tmp_path / "data")
    with pytest.raises(LogError) as err:
        load_log(tmp_path / "data", lantern, name_pattern="sub-{participant}.csv")
    (problem,) = err.value.problems
    assert problem.path == str(tmp_path / "data")
    assert "the name pattern 'sub-{participant}.csv' matches none of the folder's files" in problem.message
    assert "p01_s1.csv" in problem.message and "\n" not in str(problem)


def test_a_glob_that_matches_no_file(tmp_path, lantern):
    with pytest.raises(LogError, match="no file matches the glob"):
        load_log(str(tmp_path / "*.csv"), lantern)
    (tmp_path / "empty").mkdir()
    with pytest.raises(LogError, match="the folder holds no log file"):
        load_log(tmp_path / "empty", lantern)


def test_two_files_for_one_participant_and_session(tmp_path, table, lantern):
    paths = split(table, tmp_path / "data", drop=["session"])
    with pytest.raises(LogError) as err:
        load_log(tmp_path / "data", lantern)
    first, second, third = err.value.problems  # p01, p02 and p03 each have two files
    assert first.path == str(paths[1]) and first.line == 2 and first.column == "participant"
    assert f"participant p01, session 1 is also in {paths[0]}: two files for one participant and " \
           "session" in first.message


def test_files_that_lack_a_column_the_others_have(tmp_path, table, lantern):
    paths = split(table, tmp_path / "data")
    rows = pd.read_csv(paths[2], dtype=str, keep_default_na=False)
    rows.drop(columns=["rt"]).to_csv(paths[2], index=False)
    with pytest.raises(LogError) as err:
        load_log(tmp_path / "data", lantern)
    (problem,) = err.value.problems
    assert (problem.path, problem.line) == (str(paths[2]), 1)
    assert "this file lacks column 'rt', which" in problem.message


def test_columns_nobody_reads_may_differ_with_a_warning(tmp_path, table, whole, lantern):
    paths = split(table, tmp_path / "data")
    rows = pd.read_csv(paths[0], dtype=str, keep_default_na=False)
    rows.assign(comment="tired").to_csv(paths[0], index=False)
    log = load_log(tmp_path / "data", lantern)
    pd.testing.assert_frame_equal(log.frame, whole.frame)
    assert any("the files differ in column 'comment', which foretell does not read" in w for w in log.warnings)


def test_problems_name_the_file_line_and_column(tmp_path, table, lantern):
    paths = split(table, tmp_path / "data")
    rows = pd.read_csv(paths[3], dtype=str, keep_default_na=False)
    rows.loc[3, "stimulus"] = "purple"  # file line 5
    rows.to_csv(paths[3], index=False)
    with pytest.raises(LogError) as err:
        load_log(tmp_path / "data", lantern)
    (problem,) = err.value.problems
    assert (problem.path, problem.line, problem.column) == (str(paths[3]), 5, "stimulus")


def test_a_problem_on_rows_of_two_files_lists_both(tmp_path, table, lantern):
    paths = split(table, tmp_path / "data")
    for path in paths[:2]:
        lines = path.read_text().splitlines()
        lines[2] = lines[2].rsplit(",", 1)[0] + ",-0.5"
        path.write_text("\n".join(lines) + "\n")
    with pytest.raises(LogError) as err:
        load_log(tmp_path / "data", lantern)
    (problem,) = err.value.problems
    assert problem.path == str(paths[0]) and problem.line == 3
    assert f"(lines 3 of {paths[0]}, 3 of {paths[1]})" in problem.message


def test_an_id_from_both_the_names_and_a_column_is_refused(tmp_path, table, lantern):
    split(table.rename(columns={"participant": "subject"}).assign(participant=table["participant"]),
          tmp_path / "data", name="{p}-{s}.csv", drop=["participant"])
    with pytest.raises(UsageError, match="participant would come both from the file names and from column "
                                         "'subject'"):
        load_log(tmp_path / "data", lantern, name_pattern="{participant}-*.csv",
                 columns={"participant": "subject"})


def test_name_patterns():
    regex = name_regex("{participant}/ses-{session}/**/*_{participant}.csv")
    match = regex.search("data/p07/ses-2/beh/run1/trials_p07.csv")
    assert match.groupdict() == {"participant": "p07", "session": "2"}
    assert regex.search("data/p07/ses-2/beh/trials_p08.csv") is None  # the same placeholder twice
    with pytest.raises(UsageError, match=r"unknown placeholder \{subject\}"):
        name_regex("{subject}_*.csv")
