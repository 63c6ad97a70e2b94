"""Tests of lab profiles: each shipped layout read through its profile, the profile file's checks, the template."""

from __future__ import annotations

import json
import shutil
import sys
import tomllib
from pathlib import Path

import pandas as pd
import pytest

import foretell
from foretell.errors import InputError, LogError
from foretell.logs import load_log, validate_log
from foretell.profiles import as_profile, load_profile
from foretell.profiletemplate import suggest_profile

EXAMPLES = Path(__file__).resolve().parents[1] / "examples" / "profiles"
MODELS = ["count-0", "count-1"]
LAYOUTS = ["builder-csv", "browser-json", "spreadsheet"]


@pytest.fixture(scope="module")
def canonical(lantern):
    """The invented study of examples/profiles/canonical.csv, validated, and its fits."""
    log = load_log(EXAMPLES / "canonical.csv", lantern)
    return log, foretell.fit(log, lantern, models=MODELS, seed=0)


def assert_same_fits(a, b) -> None:
    assert list(a.tables()) == list(b.tables())
    for name, table in a.tables().items():
        pd.testing.assert_frame_equal(table, b.tables()[name], obj=name)


def copy_layout(tmp_path: Path, layout: str) -> tuple[Path, Path]:
    """Return a copy of a shipped layout's files and its profile, to be changed by a test."""
    shutil.copytree(EXAMPLES / layout, tmp_path / layout)
    shutil.copy(EXAMPLES / f"{layout}.toml", tmp_path / f"{layout}.toml")
    return tmp_path / layout, tmp_path / f"{layout}.toml"


# --- every layout gives the canonical log and the same fits ------------------------------

@pytest.mark.parametrize("layout", LAYOUTS)
def test_layout_through_its_profile_gives_the_canonical_log_and_fits(layout, lantern, canonical):
    if layout == "spreadsheet":
        pytest.importorskip("openpyxl")
    expected, fits = canonical
    log = load_log(EXAMPLES / layout, lantern, profile=EXAMPLES / f"{layout}.toml")
    pd.testing.assert_frame_equal(log.frame, expected.frame)
    assert log.rt_unit in ("s", "ms") and len(log.sources) == 6
    assert log.sources == tuple(sorted(log.sources))
    assert log.mapped[0] == f"profile {EXAMPLES / f'{layout}.toml'}"
    if layout == LAYOUTS[0]:  # the fits are a function of the frame (RTs in seconds), equal above for every layout
        assert_same_fits(foretell.fit(log, lantern, models=MODELS, seed=0), fits)


def test_what_the_profile_mapped_is_reported(lantern):
    log = load_log(EXAMPLES / "builder-csv", lantern, profile=EXAMPLES / "builder-csv.toml")
    said = "\n".join(log.mapped)
    assert "response <- column 'key_resp.keys'" in said
    assert "12 rows left out: 'trials.thisN' is ''" in said  # an instruction and a goodbye row per file
    assert "3 cells of 'key_resp.keys' read as no response ('None')" in said
    assert "'f' -> 'red'" in said and "block ('trials.thisRepN') counted from 0: 1 added" in said


def test_a_profile_given_as_a_mapping_in_python(lantern, canonical):
    data = {"no_response": ["None"], "zero_based": ["block", "trial"],
            "columns": {"block": "trials.thisRepN", "trial": "trials.thisN", "stimulus": "lantern",
                        "response": "key_resp.keys", "rt": "key_resp.rt"},
            "values": {"response": {"f": "red", "g": "green", "h": "blue"}},
            "drop": [{"column": "trials.thisN", "values": [""]}]}
    log = load_log(EXAMPLES / "builder-csv", lantern, profile=data)
    pd.testing.assert_frame_equal(log.frame, canonical[0].frame)


def test_arguments_take_precedence_over_the_profile(lantern):
    ms = load_log(EXAMPLES / "builder-csv", lantern, profile=EXAMPLES / "builder-csv.toml", rt_unit="ms")
    s = load_log(EXAMPLES / "builder-csv", lantern, profile=EXAMPLES / "builder-csv.toml")
    assert ms.rt_unit == "ms" and (ms.frame["rt"] * 1000).round(9).equals(s.frame["rt"].round(9))
    renamed = load_log(EXAMPLES / "builder-csv", lantern, profile=EXAMPLES / "builder-csv.toml",
                       columns={"rt": "instr_key.rt"})
    assert renamed.frame["rt"].isna().all()  # the instruction key's RT is empty on every trial row


def test_a_frame_through_a_profile(lantern, canonical):
    frame = pd.read_csv(EXAMPLES / "builder-csv" / "p01_lanterns_2024-03-01_10h15.csv", dtype=str,
                        keep_default_na=False)
    log = validate_log(frame, lantern, profile=EXAMPLES / "builder-csv.toml")
    expected = canonical[0].frame
    mine = expected[(expected["participant"] == "p01") & (expected["session"] == 1)].reset_index(drop=True)
    pd.testing.assert_frame_equal(log.frame, mine)


# --- bad input: one line naming file, line and column -----------------------------------------

def test_a_value_with_no_entry_in_the_value_map(tmp_path, lantern):
    data, profile = copy_layout(tmp_path, "builder-csv")
    path = data / "p02_lanterns_2024-03-02_10h15.csv"
    lines = path.read_text().splitlines()
    lines[5] = lines[5].replace(",g,", ",k,").replace(",h,", ",k,").replace(",f,", ",k,")
    path.write_text("\n".join(lines) + "\n")
    with pytest.raises(LogError) as err:
        load_log(data, lantern, profile=profile)
    (problem,) = err.value.problems
    assert (problem.path, problem.line, problem.column) == (str(path), 6, "key_resp.keys")
    assert "value 'k' has no entry in the value map of response ([values.response]" in problem.message
    assert 'add k = "..." there' in problem.message
    assert "\n" not in str(problem)


def test_an_unknown_profile_key_has_a_did_you_mean_and_its_line(tmp_path):
    path = tmp_path / "lab.toml"
    path.write_text('rt_unit = "ms"\nno_responce = ["None"]\n\n[columns]\nresponce = "key"\n')
    with pytest.raises(InputError) as err:
        load_profile(path)
    first, second = err.value.problems
    assert (first.path, first.line) == (str(path), 2)
    assert "unknown profile key 'no_responce' (did you mean 'no_response'?)" in first.message
    assert second.line == 5 and "(did you mean 'response'?)" in second.message


@pytest.mark.parametrize("text,message,line", [
    ('rt_unit = "sec"\n', "rt_unit must be one of 's', 'ms'", 1),
    ('zero_based = ["blocks"]\n', "zero_based lists 'blocks'", 1),
    ('[values.responses]\nf = "red"\n', "(did you mean 'response'?)", 1),
    ('[[drop]]\ncolumn = "x"\n', "[[drop]] number 1 needs column", 1),
    ('[[keep]]\ncolumn = "x"\nvalues = ["a"]\nvalue = ["b"]\n', "unknown key 'value' in [[keep]]", 4),
    ('name_pattern = "{participent}_*.csv"\n', "(did you mean '{participant}'?)", 1),
    ('[bids]\nfiles = "eeg"\n', "[bids] files must be one of", 2),
    ("rt_unit = \n", "not valid TOML", 1),
])
def test_bad_profiles_name_the_line(tmp_path, text, message, line):
    path = tmp_path / "lab.toml"
    path.write_text(text)
    with pytest.raises(InputError) as err:
        load_profile(path)
    assert message in str(err.value) and err.value.problems[0].line == line


def test_a_value_map_must_give_task_symbols(tmp_path, lantern):
    data, profile = copy_layout(tmp_path, "builder-csv")
    profile.write_text(profile.read_text().replace('h = "blue"', 'h = "?"'))
    with pytest.raises(LogError) as err:
        load_log(data, lantern, profile=profile)
    (problem,) = err.value.problems
    assert problem.path == str(profile) and problem.line == 21
    assert "reads 'h' as '?', which is not a symbol of the task (red, green, blue)" in problem.message


def test_a_rule_on_a_column_the_log_lacks(tmp_path, lantern):
    data, profile = copy_layout(tmp_path, "builder-csv")
    profile.write_text(profile.read_text().replace('column = "trials.thisN"', 'column = "loop.thisN"'))
    with pytest.raises(LogError, match="reads column 'loop.thisN', which the log does not have"):
        load_log(data, lantern, profile=profile)


def test_a_profile_that_is_not_a_profile():
    with pytest.raises(InputError, match="no such profile file"):
        as_profile("no-such-profile.toml")
    with pytest.raises(foretell.UsageError, match="profile must be a profile file"):
        as_profile(3)


# --- the template ------------------------------------------------------------------------------

def test_the_template_of_a_builder_file_suggests_its_profile(lantern):
    text = suggest_profile(EXAMPLES / "builder-csv" / "p01_lanterns_2024-03-01_10h15.csv", lantern)
    shipped = load_profile(EXAMPLES / "builder-csv.toml")
    filled = text.replace('f = "?"', 'f = "red"').replace('g = "?"', 'g = "green"').replace('h = "?"', 'h = "blue"')
    suggested = as_profile(tomllib.loads(filled))
    assert suggested.columns == shipped.columns
    assert suggested.zero_based == ("block", "trial") and suggested.no_response == ("None",)
    assert suggested.values == shipped.values and suggested.rows == shipped.rows
    assert 'rt_unit = "s"' in text


def test_the_template_of_a_browser_file(lantern):
    text = suggest_profile(EXAMPLES / "browser-json" / "lanterns_p01_session1.json", lantern)
    assert 'name_pattern = "*_{participant}_session{session}.json"' in text and 'rt_unit = "ms"' in text
    assert '[[keep]]' in text and 'column = "trial_type"' in text and 'values = ["lantern-guess"]' in text
    assert '"img/red.png" = "?"' in text
    assert 'trial = "trial_index"' in text and 'response = "response"' in text


# --- the readers behind the layouts -----------------------------------------------------------

def test_json_problems_name_their_line(tmp_path, lantern):
    path = tmp_path / "p.json"
    path.write_text('[\n {"block": 1},\n {"block": 2,}\n]\n')
    with pytest.raises(LogError) as err:
        load_log(path, lantern)
    assert err.value.problems[0].line == 3 and "not valid JSON" in err.value.problems[0].message
    path.write_text('{"trials": []}\n')
    with pytest.raises(LogError, match="a JSON log is an array of trial objects"):
        load_log(path, lantern)
    path.write_text('[\n {"block": 1},\n 7\n]\n')
    with pytest.raises(LogError, match="element 2 of the array is not a trial object") as err:
        load_log(path, lantern)
    assert err.value.problems[0].line == 3


def test_json_rows_keep_the_line_where_each_object_opens(tmp_path, lantern):
    objects = [{"participant": "p1", "block": 1, "trial": t, "stimulus": "red", "response": "blue"}
               for t in (1, 2)]
    path = tmp_path / "p.json"
    path.write_text(json.dumps(objects, indent=2))
    objects[1]["stimulus"] = "purple"
    path.write_text(json.dumps(objects, indent=2))
    with pytest.raises(LogError) as err:
        load_log(path, lantern)
    assert err.value.problems[0].line == 9 and err.value.problems[0].column == "stimulus"


def test_a_spreadsheet_without_openpyxl_names_the_extra(tmp_path, lantern, monkeypatch):
    monkeypatch.setitem(sys.modules, "openpyxl", None)
    with pytest.raises(LogError, match=r"needs the package 'openpyxl'.*pip install 'foretell\[xlsx\]'"):
        load_log(EXAMPLES / "spreadsheet" / "p01_ses-1.xlsx", lantern)
