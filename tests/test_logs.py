"""Tests of response-log reading, validation, RT screening and the summary."""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.stats import median_abs_deviation, norm

from foretell.errors import LogError, UsageError
from foretell.logs import (RT_FLAGS, RTScreen, load_log, log_summary,
                           ValidatedLog, screen_rt, unscorable, validate_log)
from foretell.tasks import Task

TASK = Task.from_dict({"name": "t", "symbols": ["a", "b", "c"],
                       "contexts": [{"past": [], "next": {"a": 0.2, "b": 0.3, "c": 0.5}}]})

HEADER = "participant,session,block,trial,stimulus,response,rt"
GOOD = [HEADER,
        "p02,1,1,1,a,b,0.52",
        "p01,1,1,1,b,b,0.61",
        "p01,1,1,2,c,,",
        "p01,1,2,3,a,c,0.45",
        "p02,1,1,2,c,c,0.38"]


def write(tmp_path, lines, name="log.csv"):
    path = tmp_path / name
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return path


def problems_of(path, **kwargs):
    with pytest.raises(LogError) as err:
        load_log(path, TASK, **kwargs)
    return err.value.problems


# --- a valid log -----------------------------------------------------------

def test_valid_log_gives_canonical_sorted_frame(tmp_path):
    path = write(tmp_path, GOOD)
    log = load_log(path, TASK)
    frame = log.frame
    assert list(frame.columns) == ["participant", "session", "block", "trial", "stimulus",
                                   "response", "rt", "stimulus_idx", "response_idx", "missed",
                                   "rt_ok", "rt_flag"]
    assert list(frame["participant"]) == ["p01", "p01", "p01", "p02", "p02"]
    assert list(frame["trial"]) == [1, 2, 3, 1, 2]
    assert list(frame["stimulus_idx"]) == [1, 2, 0, 0, 2]
    assert list(frame["response_idx"]) == [1, -1, 2, 1, 2]
    assert list(frame["missed"]) == [False, True, False, False, False]
    assert list(frame["rt_flag"]) == ["", "missed", "", "", ""]
    assert frame["response"].isna().tolist() == [False, True, False, False, False]
    assert frame["trial"].dtype == np.int64 and frame["rt"].dtype == np.float64
    assert frame["missed"].dtype == bool and frame["rt_ok"].dtype == bool
    assert pd.api.types.is_string_dtype(frame["participant"])
    log = load_log(path, TASK)
    assert log.source == str(path) and log.task is TASK
    assert log.screen == RTScreen()
    assert log.warnings == ()


def test_participant_ids_stay_text_and_session_defaults_to_1(tmp_path):
    lines = ["participant,block,trial,stimulus,response,rt",
             "007,1,1,a,a,0.5", "007,1,2,b,a,0.5"]
    log = load_log(write(tmp_path, lines), TASK)
    frame = log.frame
    assert list(frame["participant"]) == ["007", "007"]
    assert list(frame["session"]) == [1, 1]


def test_tsv_and_detected_delimiter(tmp_path):
    tsv = write(tmp_path, [line.replace(",", "\t") for line in GOOD], "log.tsv")
    txt = write(tmp_path, [line.replace(",", ";") for line in GOOD], "log.txt")
    reference = load_log(write(tmp_path, GOOD), TASK).frame
    for path in (tsv, txt):
        pd.testing.assert_frame_equal(load_log(path, TASK).frame, reference)


def test_quoted_fields_and_blank_lines_keep_file_line_numbers(tmp_path):
    # RFC 4180 (Shafranovich, 2005): a quoted field may hold the delimiter and a line break.
    lines = [HEADER + ",note",
             'p01,1,1,1,a,a,0.5,"calm, then',
             'tired"',
             "",
             "p01,1,1,2,b,d,0.5,ok"]
    problems = problems_of(write(tmp_path, lines))
    assert [(p.line, p.column) for p in problems] == [(5, "response")]


def test_round_trip_through_csv(tmp_path):
    log = load_log(write(tmp_path, GOOD), TASK)
    frame = log.frame
    path = tmp_path / "again.csv"
    frame[["participant", "session", "block", "trial", "stimulus", "response", "rt"]].to_csv(
        path, index=False)
    again = load_log(path, TASK).frame
    pd.testing.assert_frame_equal(again, frame)


def test_validate_log_in_memory_with_typed_columns():
    df = pd.DataFrame({"participant": [3, 3, 4], "block": [1, 1, 1], "trial": [1, 2, 1],
                       "stimulus": ["a", "b", "c"], "response": ["a", None, "x"],
                       "rt": [0.4, np.nan, 0.5]})
    with pytest.raises(LogError) as err:
        validate_log(df, TASK, source="sim")
    (problem,) = err.value.problems
    assert (problem.path, problem.line, problem.column) == ("sim", 4, "response")
    df.loc[2, "response"] = "c"
    log = validate_log(df, TASK, source="sim")
    frame = log.frame
    assert list(frame["participant"]) == ["3", "3", "4"]
    assert list(frame["response_idx"]) == [0, -1, 2]


def test_column_map_and_milliseconds(tmp_path):
    lines = ["subj,blk,trial,stimulus,guess,RT_ms",
             "p01,1,1,a,b,520", "p01,1,2,b,b,1450"]
    path = write(tmp_path, lines)
    log = load_log(path, TASK, columns={"participant": "subj", "block": "blk",
                                          "response": "guess", "rt": "RT_ms"}, rt_unit="ms")
    frame = log.frame
    np.testing.assert_allclose(frame["rt"], [0.52, 1.45])  # 1 s = 1000 ms (SI)
    problems = problems_of(path, columns={"participant": "subj", "block": "blk",
                                          "response": "answer"})
    assert [(p.line, p.column) for p in problems] == [(1, "answer")]
    assert "canonical 'response'" in problems[0].message


def test_seconds_that_look_like_milliseconds_are_warned(tmp_path):
    lines = ["participant,block,trial,stimulus,response,rt", "p01,1,1,a,b,520"]
    log = load_log(write(tmp_path, lines), TASK)
    assert any("rt_unit='ms'" in w for w in log.warnings)


def test_bad_options_are_usage_errors(tmp_path):
    path = write(tmp_path, GOOD)
    with pytest.raises(UsageError):
        load_log(path, TASK, rt_unit="min")
    with pytest.raises(UsageError):
        load_log(path, TASK, columns={"respons": "guess"})
    with pytest.raises(UsageError):
        load_log(path, TASK, columns={"response": "x", "stimulus": "x"})


# --- one test per bad input -------------------------------------------------

def test_missing_required_column(tmp_path):
    lines = [",".join(f for i, f in enumerate(line.split(",")) if i != 4) for line in GOOD]
    assert lines[0] == "participant,session,block,trial,response,rt"
    problems = problems_of(write(tmp_path, lines))
    assert [(p.line, p.column) for p in problems] == [(1, "stimulus")]
    assert "missing required column" in problems[0].message


def test_missing_column_hints_at_a_near_name(tmp_path):
    lines = [GOOD[0].replace("response", "Respons")] + GOOD[1:]
    (problem,) = problems_of(write(tmp_path, lines))
    assert problem.column == "response" and "closest is 'Respons'" in problem.message


def test_unknown_symbols_list_first_lines(tmp_path):
    lines = [HEADER] + [f"p01,1,1,{t},d,a,0.5" for t in range(1, 9)]
    (problem,) = problems_of(write(tmp_path, lines))
    assert (problem.line, problem.column) == (2, "stimulus")
    assert "unknown symbol 'd'" in problem.message
    assert "lines 2, 3, 4, 5, 6 and 3 more" in problem.message


def test_non_numeric_rt(tmp_path):
    lines = GOOD[:2] + ["p01,1,1,1,b,b,fast", "p01,1,1,2,b,b,inf", "p01,1,1,3,b,b,NA"]
    (problem,) = problems_of(write(tmp_path, lines))
    assert (problem.line, problem.column) == (3, "rt")
    assert "must be a number, got 'fast' (lines 3, 4)" in problem.message


def test_decimal_comma_gets_a_hint(tmp_path):
    lines = [line.replace(",", ";") for line in GOOD[:2]] + ["p01;1;1;1;b;b;0,61"]
    (problem,) = problems_of(write(tmp_path, lines, "log.txt"))
    assert problem.line == 3 and "decimal point" in problem.message


def test_negative_rt(tmp_path):
    lines = GOOD[:2] + ["p01,1,1,1,b,b,-0.2"]
    (problem,) = problems_of(write(tmp_path, lines))
    assert (problem.line, problem.column) == (3, "rt") and "negative" in problem.message


def test_duplicated_trial(tmp_path):
    lines = GOOD + ["p01,1,2,3,b,b,0.5"]
    (problem,) = problems_of(write(tmp_path, lines))
    assert (problem.line, problem.column) == (7, "trial") and "repeats" in problem.message


def test_trials_within_a_block_are_ordered_by_number(tmp_path):
    lines = [HEADER, "p01,1,1,2,a,a,0.5", "p01,1,1,1,b,b,0.5"]
    frame = load_log(write(tmp_path, lines), TASK).frame
    assert list(zip(frame["trial"], frame["stimulus"])) == [(1, "b"), (2, "a")]


def test_trial_numbers_that_restart_in_every_block_are_accepted(tmp_path):
    lines = [HEADER] + [f"p01,1,{b},{t},{'abc'[(b + t) % 3]},a,0.5"
                        for b in (1, 2, 3) for t in (1, 2, 3)]
    frame = load_log(write(tmp_path, lines), TASK).frame
    assert list(zip(frame["block"], frame["trial"])) == [(b, t) for b in (1, 2, 3) for t in (1, 2, 3)]
    assert list(frame["stimulus"]) == ["abc"[(b + t) % 3] for b in (1, 2, 3) for t in (1, 2, 3)]


def test_only_a_true_duplicate_is_refused(tmp_path):
    lines = [HEADER, "p01,1,1,1,a,a,0.5", "p01,1,2,1,a,a,0.5", "p01,2,2,1,a,a,0.5",
             "p02,1,2,1,a,a,0.5", "p01,1,2,1,b,b,0.5"]
    (problem,) = problems_of(write(tmp_path, lines))
    assert (problem.line, problem.column) == (6, "trial") and "repeats" in problem.message


def test_order_is_checked_within_participant_and_session_only(tmp_path):
    lines = [HEADER, "p01,1,1,1,a,a,0.5", "p02,1,1,1,a,a,0.5", "p01,1,1,2,a,a,0.5",
             "p01,2,1,1,b,b,0.5", "p01,2,1,2,b,b,0.5"]
    log = load_log(write(tmp_path, lines), TASK)
    frame = log.frame
    assert list(zip(frame["participant"], frame["session"], frame["trial"])) == [
        ("p01", 1, 1), ("p01", 1, 2), ("p01", 2, 1), ("p01", 2, 2), ("p02", 1, 1)]


def test_empty_or_fractional_integers(tmp_path):
    lines = [HEADER, "p01,1,,1,a,a,0.5", "p01,1,1,2.5,b,b,0.5", "p01,1,1,3.0,b,b,0.5"]
    problems = problems_of(write(tmp_path, lines))
    assert [(p.line, p.column) for p in problems] == [(2, "block"), (3, "trial")]
    assert "empty" in problems[0].message and "whole number" in problems[1].message


def test_decreasing_block(tmp_path):
    lines = [HEADER, "p01,1,2,1,a,a,0.5", "p01,1,1,2,b,b,0.5"]
    (problem,) = problems_of(write(tmp_path, lines))
    assert (problem.line, problem.column) == (3, "block") and "decreases" in problem.message


def test_empty_file(tmp_path):
    for text in ("", "\n  \n"):
        path = tmp_path / "empty.csv"
        path.write_text(text)
        (problem,) = problems_of(path)
        assert problem.path == str(path) and "empty" in problem.message


def test_header_without_rows(tmp_path):
    (problem,) = problems_of(write(tmp_path, [HEADER]))
    assert problem.line == 1 and "no data rows" in problem.message


def test_wrong_delimiter(tmp_path):
    lines = [line.replace(",", ";") for line in GOOD]
    (problem,) = problems_of(write(tmp_path, lines, "log.csv"))
    assert problem.line == 1
    assert "wrong delimiter" in problem.message and "semicolons (';')" in problem.message


def test_ragged_line(tmp_path):
    lines = GOOD + ["p02,1,1,3,a,a"]
    (problem,) = problems_of(write(tmp_path, lines))
    assert problem.line == 7 and "6 fields" in problem.message


def test_mixed_case_and_stray_spaces_are_reported(tmp_path):
    lines = [HEADER, "p01,1,1,1,A,a,0.5", "p01,1,1,2, b,a,0.5", "p01,1,1,3,c, C ,0.5"]
    problems = problems_of(write(tmp_path, lines))
    assert [(p.line, p.column) for p in problems] == [(2, "stimulus"), (3, "stimulus"),
                                                      (4, "response")]
    assert all("fix_labels=True" in p.message for p in problems)
    assert "letter case" in problems[0].message and "stray spaces" in problems[1].message


def test_fix_labels_fixes_and_records(tmp_path):
    lines = [HEADER, "p01,1,1,1,A,a,0.5", "p01,1,1,2, b,a,0.5", "p02,1,1,1,c, C ,0.5",
             "p02,1,1,2,c,a,0.5"]
    log = load_log(write(tmp_path, lines), TASK, fix_labels=True)
    frame = log.frame
    assert list(frame["stimulus"]) == ["a", "b", "c", "c"]
    assert list(frame["response"]) == ["a", "a", "c", "a"]
    warnings = log.warnings
    assert sum("read as the task's symbol" in w for w in warnings) == 3
    summary = log_summary(log)
    assert list(summary["labels_fixed"]) == [2, 1, 3]


def test_problems_are_collected_not_stopped_at_the_first(tmp_path):
    lines = [HEADER, "p01,1,1,1,a,z,0.5", "p01,1,1,1,b,b,-1"]
    problems = problems_of(write(tmp_path, lines))
    assert [p.line for p in problems] == [2, 3, 3]  # in file order
    assert sorted((p.line, p.column) for p in problems) == [(2, "response"), (3, "rt"),
                                                           (3, "trial")]
    assert all(p.path for p in problems)


def test_group_must_be_constant_per_participant(tmp_path):
    lines = ["participant,group,block,trial,stimulus,response",
             "p01,young,1,1,a,a", "p01,old,1,2,a,a"]
    (problem,) = problems_of(write(tmp_path, lines))
    assert (problem.line, problem.column) == (3, "group")


def test_reveal_before_prompt(tmp_path):
    lines = [HEADER + ",onset,reveal_onset", "p01,1,1,1,a,a,0.5,10.0,10.6",
             "p01,1,1,2,a,a,0.5,12.0,11.9"]
    (problem,) = problems_of(write(tmp_path, lines))
    assert (problem.line, problem.column) == (3, "reveal_onset")


def test_parquet_without_pyarrow_names_the_package(tmp_path, monkeypatch):
    monkeypatch.setitem(sys.modules, "pyarrow", None)  # makes `import pyarrow` fail
    path = tmp_path / "log.parquet"
    path.write_bytes(b"PAR1")
    (problem,) = problems_of(path)
    assert "pyarrow" in problem.message and problem.path == str(path)


# --- missed guesses, guess-only logs, personal data --------------------------

def test_rt_on_missed_guess_is_a_warning(tmp_path):
    lines = GOOD[:3] + ["p01,1,1,2,c,,0.7"]
    log = load_log(write(tmp_path, lines), TASK)
    frame = log.frame
    row = frame[frame["missed"]].iloc[0]
    assert row["rt"] == 0.7 and row["rt_flag"] == "missed" and not row["rt_ok"]
    assert any("missed guess" in w and "line 4" in w for w in log.warnings)
    assert log_summary(log)["missed_with_rt"].iloc[-1] == 1


@pytest.mark.parametrize("drop_rt", [True, False])
def test_guess_only_log(tmp_path, drop_rt):
    lines = [line.rsplit(",", 1)[0] + ("" if drop_rt else ",") for line in GOOD]
    if not drop_rt:
        lines[0] = HEADER
    log = load_log(write(tmp_path, lines), TASK)
    frame = log.frame
    assert frame["rt"].isna().all() and not frame["rt_ok"].any()
    assert set(frame["rt_flag"]) == {"missed", "no-rt"}
    assert any("RT analyses will be skipped" in w for w in log.warnings)


def test_identifying_columns_are_dropped_with_a_warning(tmp_path):
    lines = [HEADER + ",FirstName,email,date_of_birth,condition",
             "p01,1,1,1,a,a,0.5,Ann,ann@example.org,2001-01-01,x"]
    log = load_log(write(tmp_path, lines), TASK)
    frame = log.frame
    assert not {"FirstName", "email", "date_of_birth", "condition"} & set(frame.columns)
    (personal,) = [w for w in log.warnings if "personal data" in w]
    assert "'FirstName'" in personal and "'email'" in personal and "'date_of_birth'" in personal
    assert "condition" not in personal


# --- RT screening ------------------------------------------------------------

def test_default_screen_limits():
    # floor: common practice (premature presses below about 0.1-0.15 s); ceiling 3 s: our choice.
    assert (RTScreen().floor, RTScreen().ceiling, RTScreen().mad_k) == (0.15, 3.0, None)


def test_floor_and_ceiling_flag_without_removing(tmp_path):
    lines = [HEADER] + [f"p01,1,1,{i},a,b,{rt}" for i, rt in
                        enumerate(["0.08", "0.15", "0.9", "3.0", "4.2", "0"], start=1)]
    log = load_log(write(tmp_path, lines), TASK)
    frame = log.frame
    assert list(frame["rt_flag"]) == ["fast", "", "", "", "slow", "fast"]
    loose = load_log(write(tmp_path, lines), TASK, screen=RTScreen(floor=0.05, ceiling=5.0)).frame
    assert list(loose["rt_flag"]) == ["", "", "", "", "", "fast"]
    assert len(frame) == len(loose) == 6
    summary = log_summary(log, totals=False)
    assert summary.loc[0, ["rt_fast", "rt_slow", "rt_usable"]].tolist() == [2, 1, 3]


def test_mad_scale_is_the_normal_consistency_constant():
    # 1 / Phi^-1(3/4) = 1.4826 (Rousseeuw & Croux, 1993; common practice)
    from foretell.logs import _MAD_SCALE
    assert _MAD_SCALE == pytest.approx(1 / norm.ppf(0.75), rel=1e-12)
    assert _MAD_SCALE == pytest.approx(1.4826, abs=1e-4)


def test_mad_rule_matches_scipy_reference():
    rng = np.random.default_rng(7)
    rt = np.exp(rng.normal(-0.6, 0.35, size=200))
    rt[[3, 50]] = [2.9, 0.16]  # inside floor/ceiling, far in log RT
    log = validate_log(pd.DataFrame({
        "participant": ["p01"] * 100 + ["p02"] * 100, "block": 1,
        "trial": np.tile(np.arange(1, 101), 2), "stimulus": "a", "response": "b", "rt": rt}),
        TASK, screen=RTScreen(floor=0.15, ceiling=3.0, mad_k=3))
    frame = log.frame
    expected = []
    for part in ("p01", "p02"):
        x = np.log(rt[(frame["participant"] == part).to_numpy()])
        # scaled MAD from SciPy (Virtanen et al., 2020), scale="normal"
        mad = median_abs_deviation(x, scale="normal")
        expected += list(np.abs(x - np.median(x)) > 3 * mad)
    assert (frame["rt_flag"] == "mad").tolist() == expected
    assert frame.loc[3, "rt_flag"] == "mad" and frame.loc[50, "rt_flag"] == "mad"
    assert log_summary(log)["rt_mad"].iloc[-1] == sum(expected)


def test_mad_of_zero_flags_nothing_and_warns():
    log = validate_log(pd.DataFrame({
        "participant": "p01", "block": 1, "trial": [1, 2, 3, 4], "stimulus": "a",
        "response": "a", "rt": [0.5, 0.5, 0.5, 2.0]}), TASK, screen=RTScreen(mad_k=3))
    frame = log.frame
    assert (frame["rt_flag"] == "").all()
    assert any("MAD of their 4 log RTs is 0" in w for w in log.warnings)
    assert screen_rt(log, RTScreen()).warnings == ()  # rescreening replaces it


def test_rescreening_replaces_flags():
    log = validate_log(pd.DataFrame({
        "participant": "p01", "block": 1, "trial": [1, 2], "stimulus": "a",
        "response": "a", "rt": [0.12, 0.5]}), TASK)
    frame = log.frame
    assert list(frame["rt_flag"]) == ["fast", ""]
    again = screen_rt(log, RTScreen(floor=0.1))
    assert list(again.frame["rt_flag"]) == ["", ""] and again.screen.floor == 0.1
    assert again.warnings == log.warnings == ()
    assert list(frame["rt_flag"]) == ["fast", ""]


@pytest.mark.parametrize("kwargs", [{"floor": -0.1}, {"floor": 1.0, "ceiling": 0.5},
                                    {"mad_k": 0}, {"floor": float("nan")}])
def test_bad_screen_is_a_usage_error(kwargs):
    with pytest.raises(UsageError):
        RTScreen(**kwargs)


rts = st.lists(st.one_of(st.none(), st.floats(0, 10)), min_size=1, max_size=40)


@settings(max_examples=60, deadline=None)
@given(rts, st.floats(0, 1), st.floats(1.2, 8), st.sampled_from([None, 2.5, 3.0]))
def test_screening_properties(rt, floor, ceiling, mad_k):
    n = len(rt)
    log = validate_log(pd.DataFrame({
        "participant": ["p01", "p02"] * (n // 2) + ["p01"] * (n % 2), "block": 1,
        "trial": np.arange(1, n + 1), "stimulus": "a",
        "response": ["" if i % 5 == 4 else "b" for i in range(n)],
        "rt": [np.nan if r is None else r for r in rt]}), TASK,
        screen=RTScreen(floor=floor, ceiling=ceiling, mad_k=mad_k))
    frame = log.frame
    assert len(frame) == n  # screening never removes a trial
    assert set(frame["rt_flag"]) <= set(RT_FLAGS)
    assert (frame["rt_ok"] == (frame["rt_flag"] == "")).all()
    ok = frame[frame["rt_ok"]]
    assert ((ok["rt"] >= floor) & (ok["rt"] <= ceiling) & (ok["rt"] > 0)).all()
    stricter = screen_rt(log, RTScreen(floor=min(floor + 0.1, 1.0), ceiling=ceiling - 0.01)).frame
    # without the MAD rule, a stricter screen never makes a trial usable again
    assert not (stricter["rt_ok"] & ~screen_rt(log, RTScreen(floor, ceiling)).frame["rt_ok"]).any()


# --- summary -----------------------------------------------------------------

def test_summary_counts_and_totals(tmp_path):
    lines = ["participant,group,session,block,trial,stimulus,response,rt",
             "p01,young,1,1,1,a,a,0.5", "p01,young,1,2,2,a,,", "p01,young,2,1,1,a,b,0.1",
             "p02,old,1,1,1,b,b,5.0", "p02,old,1,1,2,b,b,"]
    summary = log_summary(load_log(write(tmp_path, lines), TASK))
    assert list(summary.columns) == ["participant", "group", "sessions", "blocks", "trials",
                                     "missed", "missed_with_rt", "rt_missing", "rt_fast",
                                     "rt_slow", "rt_mad", "rt_usable", "labels_fixed"]
    assert list(summary["participant"]) == ["p01", "p02", "all"]
    assert summary["group"].tolist()[:2] == ["young", "old"] and pd.isna(summary["group"][2])
    rows = summary.set_index("participant")[["sessions", "blocks", "trials", "missed",
                                             "rt_missing", "rt_fast", "rt_slow", "rt_usable"]]
    assert rows.loc["p01"].tolist() == [2, 3, 3, 1, 0, 1, 0, 1]
    assert rows.loc["p02"].tolist() == [1, 1, 2, 0, 1, 0, 1, 0]
    total = rows.loc["p01"] + rows.loc["p02"]
    total[["sessions", "blocks"]] = [2, 3]  # distinct sessions and session x block pairs of the log
    assert rows.loc["all"].tolist() == total.tolist()


@pytest.mark.parametrize("column", ["participant", "group"])
def test_reserved_all_label_is_refused(column: str, tmp_path) -> None:
    # "all" labels everyone / the whole session in every output table, so an id "all" would collide.
    task = Task.from_dict({"name": "t", "symbols": ["a", "b"],
                           "contexts": [{"past": [], "next": {"a": 0.5, "b": 0.5}}]})
    frame = pd.DataFrame({"participant": ["p01", "p01"], "group": ["g", "g"], "block": [1, 1],
                          "trial": [1, 2], "stimulus": ["a", "b"], "response": ["a", "a"]})
    frame[column] = "all"
    with pytest.raises(LogError, match="reserved"):
        validate_log(frame, task)


def test_map_onto_another_canonical_column_is_refused() -> None:
    task = Task.from_dict({"name": "t", "symbols": ["a", "b"],
                           "contexts": [{"past": [], "next": {"a": 0.5, "b": 0.5}}]})
    frame = pd.DataFrame({"participant": ["p01"], "block": [1], "trial": [1], "stimulus": ["a"],
                          "response": ["b"], "guess": ["a"]})
    with pytest.raises(UsageError, match="'response' from 'stimulus'"):
        validate_log(frame, task, columns={"response": "stimulus"})
    swapped = validate_log(frame, task, columns={"response": "stimulus", "stimulus": "guess"}).frame
    assert swapped[["stimulus", "response"]].values.tolist() == [["a", "a"]]


def test_seconds_read_as_milliseconds_warns() -> None:
    task = Task.from_dict({"name": "t", "symbols": ["a", "b"],
                           "contexts": [{"past": [], "next": {"a": 0.5, "b": 0.5}}]})
    frame = pd.DataFrame({"participant": ["p01"] * 3, "block": [1] * 3, "trial": [1, 2, 3],
                          "stimulus": ["a", "b", "a"], "response": ["b", "a", "a"],
                          "rt": [0.41, 0.52, 0.38]})
    log = validate_log(frame, task, rt_unit="ms")
    assert any("if the RTs are in seconds" in w for w in log.warnings)


def test_missing_parquet_is_no_such_file(tmp_path) -> None:
    task = Task.from_dict({"name": "t", "symbols": ["a", "b"],
                           "contexts": [{"past": [], "next": {"a": 0.5, "b": 0.5}}]})
    with pytest.raises(LogError, match="no such file"):
        load_log(tmp_path / "nothing.parquet", task)


def test_parquet_log_equals_the_csv_log(tmp_path) -> None:
    # Apache Parquet (an open standard) read through pandas/pyarrow: the same trials as the CSV.
    pytest.importorskip("pyarrow")
    from foretell.tasks import load_task

    task = load_task("lantern-relay")
    csv_path = Path(__file__).resolve().parents[1] / "src" / "foretell" / "data" / "demo_log.csv"
    raw = pd.read_csv(csv_path, keep_default_na=False, na_values={"rt": [""]}).head(1200)
    raw.to_csv(tmp_path / "log.csv", index=False)
    raw.to_parquet(tmp_path / "log.parquet")
    from_csv = load_log(tmp_path / "log.csv", task).frame
    from_parquet = load_log(tmp_path / "log.parquet", task).frame
    pd.testing.assert_frame_equal(from_csv.reset_index(drop=True), from_parquet.reset_index(drop=True),
                                  check_dtype=False)


# --- regressions: inputs that used to overflow, crash or mislead --------------

@pytest.mark.parametrize("column,value", [("block", "1e19"), ("block", "1e20"),
                                          ("trial", "99999999999999999999"),
                                          ("session", "9007199254740992"), ("trial", "-1e300"),
                                          ("trial", "9" * 5000), ("block", "1e999999999")])
def test_numbers_too_large_are_refused(tmp_path, column, value):
    row = {"participant": "p01", "session": "1", "block": "1", "trial": "2",
           "stimulus": "a", "response": "a", "rt": "0.5"}
    row[column] = value
    lines = [HEADER, "p01,1,1,1,a,a,0.5", ",".join(row[c] for c in HEADER.split(","))]
    (problem,) = problems_of(write(tmp_path, lines))
    assert (problem.line, problem.column) == (3, column)
    assert f"{column} number too large" in problem.message


def test_large_whole_numbers_below_the_limit_are_read_exactly(tmp_path):
    lines = [HEADER, "p01,1,1,9007199254740990,a,a,0.5", "p01,1,1,9007199254740991,b,a,0.5",
             "p01,1,2,1e3,c,a,0.5"]
    frame = load_log(write(tmp_path, lines), TASK).frame
    assert list(frame["trial"]) == [9007199254740990, 9007199254740991, 1000]


def test_numbers_too_large_in_a_frame_are_refused():
    frame = pd.DataFrame({"participant": ["p01", "p01"], "block": np.array([1, 2**63 + 1], dtype=np.uint64),
                          "trial": [1.0, 1e20], "stimulus": ["a", "b"], "response": ["a", "a"]})
    with pytest.raises(LogError) as err:
        validate_log(frame, TASK)
    assert [(p.line, p.column) for p in err.value.problems] == [(3, "block"), (3, "trial")]
    assert all("too large" in p.message for p in err.value.problems)


@pytest.mark.parametrize("column,value", [("participant", "p\x0001"), ("group", "young\x07"),
                                          ("participant", "p\u200b01"), ("stimulus", "a\x00"),
                                          ("response", "\x00b")])
def test_control_characters_are_refused(tmp_path, column, value):
    header = "participant,group,block,trial,stimulus,response"
    row = dict(zip(header.split(","), ["p01", "young", "1", "2", "a", "a"]))
    row[column] = value
    lines = [header, "p01,young,1,1,a,a", ",".join(row.values())]
    problems = problems_of(write(tmp_path, lines))
    assert [(p.line, p.column) for p in problems][:1] == [(3, column)]
    assert "control character U+" in problems[0].message


def test_a_log_of_only_delimiters_is_one_problem(tmp_path):
    path = tmp_path / "log.csv"
    path.write_text(",,,,\n,,,,\n")
    (problem,) = problems_of(path)
    assert problem.line == 1 and "the header line has no column names" in problem.message


def test_missing_columns_suggest_the_closest_and_show_both_spellings(tmp_path):
    lines = ["participant,blocks,trial,stimulus,guess", "p01,1,1,a,b"]
    problems = problems_of(write(tmp_path, lines))
    assert [p.column for p in problems] == ["block", "response"]
    block, response = (p.message for p in problems)
    assert "the log has 'participant', 'blocks', 'trial', 'stimulus', 'guess'" in block
    assert "closest is 'blocks'" in block and "columns={'block': 'blocks'}" in block
    assert "--map block=blocks" in block
    assert "closest" not in response and "--map response=" in response


def test_unterminated_quote_names_its_line(tmp_path):
    lines = GOOD[:3] + ['p01,1,1,2,c,"b,0.5'] + GOOD[4:] + [f"p03,1,1,{t},a,a,0.5" for t in range(1, 6)]
    (problem,) = problems_of(write(tmp_path, lines))
    assert problem.line == 4
    assert "unterminated quote starting on line 4" in problem.message
    assert "end of the file" in problem.message


def test_quote_closed_much_later_is_still_named(tmp_path):
    lines = [HEADER + ",note", 'p01,1,1,1,a,a,0.5,"oops', "p01,1,1,2,b,b,0.5,x",
             'p01,1,1,3,b,b,0.5,"ok"', "p01,1,1,4,b,b,0.5,y"]
    problems = problems_of(write(tmp_path, lines))
    assert problems[0].line == 2 and "unterminated quote starting on line 2" in problems[0].message


@pytest.mark.parametrize("encoding,line", [("latin-1", 4), ("utf-16", 1), ("utf-16-le", 1)])
def test_foreign_encodings_name_a_line(tmp_path, encoding, line):
    path = tmp_path / "log.csv"
    lines = GOOD[:3] + ["p01,1,1,2,c,,caf\u00e9"] + GOOD[4:]
    path.write_bytes(("\n".join(lines) + "\n").encode(encoding))
    (problem,) = problems_of(path)
    assert problem.line == line
    assert ("UTF-16" in problem.message) == encoding.startswith("utf-16")
    assert "offset" not in problem.message and "save" in problem.message


def test_counts_are_singular_or_plural(tmp_path):
    one = load_log(write(tmp_path, GOOD[:3] + ["p01,1,1,2,c,,0.7"]), TASK)
    assert any("1 missed guess carries an RT" in w for w in one.warnings)
    two = load_log(write(tmp_path, GOOD[:3] + ["p01,1,1,2,c,,0.7", "p01,1,1,3,c,,0.7"]), TASK)
    assert any("2 missed guesses carry an RT" in w for w in two.warnings)
    ragged = problems_of(write(tmp_path, [HEADER, "p01"]))
    assert "has 1 field but" in ragged[0].message


# --- unscorable participants ---------------------------------------------------

def _log_of(responses: dict[str, list[str]]) -> ValidatedLog:
    rows = [{"participant": p, "session": 1 + (t >= 4), "block": 1, "trial": t % 4 + 1,
             "stimulus": "abc"[t % 3], "response": r}
            for p, guesses in responses.items() for t, r in enumerate(guesses)]
    return validate_log(pd.DataFrame(rows), TASK)


def test_unscorable_participants_and_reasons():
    log = _log_of({"p01": ["a", "b", "", "c", "a", "b", "c", "a"],   # fine
                   "p02": [""] * 8,                                 # never guessed
                   "p03": ["a", "b", "", "", "c", "a", "", ""],     # guesses only in warm-up
                   "p04": ["b"] * 8})                               # the same guess: scorable
    table = unscorable(log, warmup=2)
    assert list(table.columns) == ["participant", "reason"]
    assert table.values.tolist() == [
        ["p02", "every guess missed"],
        ["p03", "no guess after the first 2 trials of a session (warm-up)"]]
    assert unscorable(log, warmup=0)["participant"].tolist() == ["p02"]
    assert unscorable(log, warmup=3)["participant"].tolist() == ["p02", "p03"]
    everyone = unscorable(log, warmup=4)  # sessions of 4 trials: all warm-up
    assert everyone["participant"].tolist() == ["p01", "p02", "p03", "p04"]
    assert everyone["reason"].str.contains("warm-up").tolist() == [True, False, True, True]


def test_unscorable_of_a_clean_log_is_empty_and_bad_warmup_is_a_usage_error(tmp_path):
    log = load_log(write(tmp_path, GOOD), TASK)
    assert unscorable(log, warmup=1).empty
    for warmup in (-1, 1.5, True):
        with pytest.raises(UsageError):
            unscorable(log, warmup=warmup)


def test_measure_columns_are_carried_over_as_numbers(tmp_path):
    lines = [HEADER + ",p3_amp", "p01,1,1,1,a,a,0.5,2.5", "p01,1,1,2,b,b,0.5,", "p01,1,1,3,a,b,0.5,-1e-3"]
    log = load_log(write(tmp_path, lines), TASK, measures=["p3_amp"])
    assert np.allclose(log.frame["p3_amp"], [2.5, np.nan, -1e-3], equal_nan=True)
    assert not any("p3_amp" in w for w in log.warnings)
    bad = [HEADER + ",p3_amp", "p01,1,1,1,a,a,0.5,big"]
    (problem,) = problems_of(write(tmp_path, bad, "bad.csv"), measures=["p3_amp"])
    assert (problem.line, problem.column) == (2, "p3_amp")
    (missing,) = problems_of(write(tmp_path, GOOD, "m.csv"), measures=["p3_amp"])
    assert "missing measure column 'p3_amp'" in missing.message
    with pytest.raises(UsageError, match="shadow"):
        load_log(write(tmp_path, GOOD, "s.csv"), TASK, measures=["rt_ok"])


# --- issue 20: nothing silently wrong ------------------------------------------

def test_a_stimulus_the_task_cannot_produce_is_warned(tmp_path):
    task = Task.from_dict({"name": "alt", "symbols": ["a", "b"], "contexts": [
        {"past": ["a"], "next": {"a": 0.0, "b": 1.0}}, {"past": ["b"], "next": {"a": 0.5, "b": 0.5}}]})
    lines = ["participant,block,trial,stimulus,response",
             "p02,1,1,a,a", "p02,1,2,b,a",
             "p01,1,1,b,a", "p01,1,2,a,a", "p01,1,3,a,a", "p01,1,4,a,b"]
    log = load_log(write(tmp_path, lines), task)
    (warning,) = [w for w in log.warnings if "probability 0" in w]
    assert "participant p01" in warning and "line 6" in warning and "context 'a'" in warning
    assert "2 such trials" in warning and "p02" not in warning


@pytest.mark.parametrize("names", [["RT", "Group", "Session"], [" rt ", "group", "SESSION "]])
def test_column_names_in_another_case_or_with_spaces_are_read(tmp_path, names):
    rt, group, session = names
    lines = [f"participant,{group},{session},block,trial,stimulus,response,{rt}",
             "p01,young,2,1,1,a,b,0.5", "p01,young,2,1,2,b,b,0.6"]
    log = load_log(write(tmp_path, lines), TASK)
    frame = log.frame
    assert frame["rt"].tolist() == [0.5, 0.6] and frame["group"].tolist() == ["young", "young"]
    assert frame["session"].tolist() == [2, 2]
    for theirs, canonical in zip(names, ("rt", "group", "session")):
        if theirs != canonical:
            assert f"column {theirs!r} read as {canonical!r}" in log.warnings
    assert not any("ignored" in w for w in log.warnings)


def test_a_look_alike_beside_the_canonical_column_is_named(tmp_path):
    lines = [HEADER + ",RT", "p01,1,1,1,a,b,0.5,512"]
    log = load_log(write(tmp_path, lines), TASK)
    (warning,) = [w for w in log.warnings if "'RT'" in w]
    assert "looks like 'rt'" in warning and "'rt' was read" in warning


def test_a_look_alike_of_a_mapped_column_is_named(tmp_path):
    lines = ["participant,block,trial,stimulus,guess,Response", "p01,1,1,a,b,c"]
    log = load_log(write(tmp_path, lines), TASK, columns={"response": "guess"})
    assert "column 'Response' looks like 'response' but 'guess' was read; 'Response' was ignored" in log.warnings
    assert log.frame["response"].tolist() == ["b"]


def test_two_look_alikes_are_a_problem(tmp_path):
    lines = ["participant,block,trial,stimulus,response,RT,Rt", "p01,1,1,a,b,0.5,0.6"]
    (problem,) = problems_of(write(tmp_path, lines))
    assert problem.column == "RT" and "'RT', 'Rt'" in problem.message and "--map rt=" in problem.message


def test_a_mapped_name_with_stray_spaces(tmp_path):
    from foretell.cli.main import main

    lines = [" participant ,block,trial,stimulus,response", "p01,1,1,a,b"]
    path = write(tmp_path, lines)
    for columns in ({"participant": " participant "}, {"participant": "participant"}, None):
        assert load_log(path, TASK, columns=columns).frame["participant"].tolist() == ["p01"]
    task_file = tmp_path / "t.toml"
    task_file.write_text('name = "t"\nsymbols = ["a", "b", "c"]\n')
    assert main(["check", str(path), "--task", str(task_file), "--map", "participant= participant"]) == 0


def test_a_missing_column_suggestion_is_quoted_for_the_shell(tmp_path):
    lines = ["participant,block,trial,stimulus,the response", "p01,1,1,a,b"]
    (problem,) = problems_of(write(tmp_path, lines))
    assert "--map 'response=the response'" in problem.message


def test_participants_with_rts_in_another_unit_are_named(tmp_path):
    lines = [HEADER] + [f"p0{p},1,1,{t},a,b,{512 + t if p in (3, 5) else 0.5 + t / 100}"
                        for p in range(1, 7) for t in (1, 2, 3)]
    log = load_log(write(tmp_path, lines), TASK)
    (warning,) = [w for w in log.warnings if "median RT" in w]
    assert "participants p03, p05" in warning and "milliseconds" in warning
    for p in ("p01", "p02", "p04", "p06"):
        assert p not in warning
    seconds = load_log(write(tmp_path, lines, "ms.csv"), TASK, rt_unit="ms")
    (warning,) = [w for w in seconds.warnings if "median RT" in w]
    assert "participants p01, p02, p04, p06" in warning and "seconds" in warning


@pytest.mark.parametrize("first", ["sep=,", "# exported by the lab's stimulus program"])
def test_a_line_before_the_header_is_one_problem(tmp_path, first):
    lines = [first] + GOOD * 1 + [f"p03,1,1,{t},a,a,0.5" for t in range(1, 200)]
    (problem,) = problems_of(write(tmp_path, lines))
    assert problem.line == 1 and "header seems to be on line 2" in problem.message


@pytest.mark.parametrize("column,cell,fragment", [
    ("trial", '"1,001"', "thousands separator"), ("rt", '"1,001"', "thousands separator"),
    ("rt", '"0,5"', "decimal point")])
def test_commas_in_numbers_name_the_cause(tmp_path, column, cell, fragment):
    row = {"participant": "p01", "session": "1", "block": "1", "trial": "2", "stimulus": "a",
           "response": "a", "rt": "0.5"}
    row[column] = cell
    lines = [HEADER, "p01,1,1,1,a,a,0.5", ",".join(row[c] for c in HEADER.split(","))]
    (problem,) = problems_of(write(tmp_path, lines))
    assert (problem.line, problem.column) == (3, column) and fragment in problem.message
    if fragment == "thousands separator":
        assert "decimal point" not in problem.message or column == "rt"


@pytest.mark.parametrize("data,fragment", [
    (b"\x1f\x8b\x08\x00" + bytes(range(200)), "gzip"),
    (b"PK\x03\x04" + bytes(range(200)), "zip archive"),
    (b"\xd0\xcf\x11\xe0\xa1\xb1\x1a\xe1" + bytes(range(200)), "Excel")], ids=["gzip", "xlsx", "xls"])
def test_compressed_and_spreadsheet_files_are_named(tmp_path, data, fragment):
    path = tmp_path / "log.csv"
    path.write_bytes(data)
    (problem,) = problems_of(path)
    assert fragment in problem.message and "Latin-1" not in problem.message and "CSV" in problem.message


def test_ids_longer_than_the_limit_are_refused_up_front(tmp_path):
    from foretell.labels import MAX_LABEL_LENGTH

    long_id = "p" * 5000
    lines = [HEADER, f"{long_id},1,1,1,a,a,0.5", "p02,1,1,1,a,a,0.5"]
    (problem,) = problems_of(write(tmp_path, lines))
    assert (problem.line, problem.column) == (2, "participant")
    assert f"at most {MAX_LABEL_LENGTH} characters" in problem.message and "5000" in problem.message
    assert len(str(problem)) < 400
    assert MAX_LABEL_LENGTH == 64


def test_load_log_takes_a_task_name_or_file(tmp_path):
    lines = ["participant,block,trial,stimulus,response", "p01,1,1,up,down"]
    log = load_log(write(tmp_path, lines), "tide-gauge")
    assert log.task.name == "tide-gauge" and log.frame["response_idx"].tolist() == [1]


def test_arguments_are_refused_in_words(tmp_path):
    path = write(tmp_path, GOOD)
    with pytest.raises(UsageError, match="columns must be a mapping"):
        load_log(path, TASK, columns=["participant", "block"])
    with pytest.raises(UsageError, match="measures must be a list"):
        load_log(path, TASK, measures="p3_amp")
    with pytest.raises(UsageError, match="did you mean 'ms'"):
        load_log(path, TASK, rt_unit="mss")
    with pytest.raises(UsageError, match="DataFrame"):
        validate_log(GOOD, TASK)
    with pytest.raises(UsageError, match="RTScreen"):
        load_log(path, TASK, screen=(0.1, 2))
    with pytest.raises(UsageError, match="log file"):
        load_log(3, TASK)
    with pytest.raises(UsageError, match="validated log"):
        log_summary(pd.DataFrame())


def test_the_all_row_counts_distinct_sessions_and_blocks(tmp_path):
    lines = ["participant,session,block,trial,stimulus,response",
             "p01,1,1,1,a,a", "p01,1,2,2,a,a", "p02,1,1,1,a,a", "p02,1,2,2,a,a", "p02,2,1,1,a,a"]
    summary = log_summary(load_log(write(tmp_path, lines), TASK)).set_index("participant")
    assert summary.loc["p01", ["sessions", "blocks"]].tolist() == [1, 2]
    assert summary.loc["p02", ["sessions", "blocks"]].tolist() == [2, 3]
    assert summary.loc["all", ["sessions", "blocks", "trials"]].tolist() == [2, 3, 5]


def test_one_ignored_column_is_singular(tmp_path):
    log = load_log(write(tmp_path, [HEADER + ",condition", "p01,1,1,1,a,a,0.5,x"]), TASK)
    assert "column 'condition' is not part of the log format and was ignored" in log.warnings


# --- files of other layouts and what a log records of its files ---------------------------------

def test_whole_milliseconds_read_as_exactly_the_seconds_they_write(tmp_path):
    lines = [HEADER] + [f"p01,1,1,{t},a,a,{ms}" for t, ms in enumerate((523, 1, 999, 1234, 70), start=1)]
    log = load_log(write(tmp_path, lines), TASK, rt_unit="ms")
    assert log.frame["rt"].tolist() == [0.523, 0.001, 0.999, 1.234, 0.07]


def test_one_file_records_itself_as_the_source(tmp_path):
    path = write(tmp_path, GOOD)
    log = load_log(path, TASK)
    assert log.sources == (str(path),) and log.mapped == ()
    assert validate_log(pd.read_csv(path), TASK).sources == ()


@pytest.mark.parametrize("name,personal", [("expName", False), ("file_name", False), ("stimName", False),
                                           ("first_name", True), ("Name", True), ("participant_email", True)])
def test_names_of_things_are_not_personal_data(tmp_path, name, personal):
    log = load_log(write(tmp_path, [HEADER + f",{name}", "p01,1,1,1,a,a,0.5,x"]), TASK)
    assert any("personal data" in w for w in log.warnings) is personal


def test_a_spreadsheet_reports_its_row_numbers(tmp_path):
    pytest.importorskip("openpyxl")
    path = tmp_path / "log.xlsx"
    table = pd.DataFrame({"participant": ["p01", None, "p01", "p01"], "block": [1, None, 1, 1],
                          "trial": [1, None, 2, 3], "stimulus": ["a", None, "b", "z"],
                          "response": ["a", None, "b", "c"], "rt": [0.5, None, 0.6, 0.7]})
    table.to_excel(path, index=False)
    (problem,) = problems_of(path)
    assert (problem.line, problem.column) == (5, "stimulus") and "unknown symbol 'z'" in problem.message
    table.loc[3, "stimulus"] = "c"
    table.to_excel(path, index=False)
    assert load_log(path, TASK).frame["trial"].tolist() == [1, 2, 3]


def test_a_line_above_a_header_of_mapped_names_is_named(tmp_path):
    lines = ["sep=,", "subj,blk,trl,stim,resp,rt", "p01,1,1,a,a,0.5", "p01,1,2,b,b,0.5"]
    columns = {"participant": "subj", "block": "blk", "trial": "trl", "stimulus": "stim", "response": "resp"}
    (problem,) = problems_of(write(tmp_path, lines), columns=columns)
    assert problem.line == 1 and "header seems to be on line 2" in problem.message
