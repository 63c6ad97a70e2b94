"""Response logs: the validated trial table (:class:`ValidatedLog`), reaction-time screening and summaries.

Reading a file is :mod:`foretell.logread`, many files :mod:`foretell.logsets`
and :mod:`foretell.bids`, a lab's own layout :mod:`foretell.profiles`, column
names :mod:`foretell.logcolumns`, the cell checks :mod:`foretell.logcheck`;
this module is their public face.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import TYPE_CHECKING, Mapping, Sequence

import numpy as np
import pandas as pd

from .bids import find_bids_files, is_bids_root
from .errors import UsageError
from .labels import ALL
from .logcheck import MAX_INTEGER, RT_UNITS, check_cells
from .logcolumns import CANONICAL, REQUIRED, check_column_map
from .logsets import LogTable, find_log_files, read_log_files
from .profiles import Profile, as_profile
from .text import plural
from .validation import check_count, check_option

if TYPE_CHECKING:
    from .tasks import Task

__all__ = ["CANONICAL", "DERIVED", "MAX_INTEGER", "REQUIRED", "RTScreen", "RT_FLAGS", "RT_UNITS",
           "ValidatedLog", "load_log", "log_summary", "screen_rt", "unscorable", "validate_log"]

DERIVED = ("stimulus_idx", "response_idx", "missed", "rt_ok", "rt_flag")
"""The columns validation adds to a log's own."""
RT_FLAGS = ("", "missed", "no-rt", "fast", "slow", "mad")
"""The values of ``rt_flag`` ("" = usable); see :func:`screen_rt`."""
_MAD_SCALE = 1.0 / 0.6744897501960817  # 1 / Phi^-1(3/4): MAD -> SD under normality


@dataclass(frozen=True)
class RTScreen:
    """Limits that decide which reaction times an RT analysis may use (seconds).

    Parameters
    ----------
    floor : float, default 0.15
        Guesses faster than this are premature presses, flagged "fast"
        (common practice: about 0.1-0.15 s); an RT of 0 is always "fast".
    ceiling : float, default 3.0
        Guesses slower than this are flagged "slow" (common practice: 2-3 s
        for prompted responses; slower guesses mostly reflect lapses of
        attention). ``math.inf`` switches it off.
    mad_k : float or None, default None
        When set, per participant, an RT that passed floor and ceiling is
        flagged "mad" if |log RT - median log RT| > mad_k * MAD, with the
        scaled MAD = 1.4826 * median |log RT - median log RT| (common
        practice; Leys et al., 2013, recommend k = 2.5 to 3). ``None``
        switches the rule off.

    Raises
    ------
    UsageError
        For a negative or non-finite floor, a ceiling not above the floor, or
        a MAD factor that is not a positive number.

    References
    ----------
    Leys, C., Ley, C., Klein, O., Bernard, P., & Licata, L. (2013). Detecting outliers: Do
    not use standard deviation around the mean, use absolute deviation around the median.
    Journal of Experimental Social Psychology, 49(4), 764-766.
    """

    floor: float = 0.15
    ceiling: float = 3.0
    mad_k: float | None = None

    def __post_init__(self) -> None:
        if not (math.isfinite(self.floor) and self.floor >= 0):
            raise UsageError(f"RT floor must be a number >= 0 seconds, got {self.floor!r}")
        if not self.ceiling > self.floor:
            raise UsageError(f"RT ceiling ({self.ceiling!r} s) must be above the floor "
                             f"({self.floor!r} s)")
        if self.mad_k is not None and not (math.isfinite(self.mad_k) and self.mad_k > 0):
            raise UsageError(f"MAD factor must be a positive number, got {self.mad_k!r}")

    def __str__(self) -> str:
        mad = ("off" if self.mad_k is None
               else f"beyond {self.mad_k:g} scaled MADs of log RT, per participant")
        return f"RT screen: floor {self.floor:g} s, ceiling {self.ceiling:g} s, MAD rule {mad}"


@dataclass(frozen=True, eq=False)
class ValidatedLog:
    """A response log that passed validation against its task: the trial table and what is known of it.

    Attributes
    ----------
    frame : pandas.DataFrame
        One row per trial: the canonical columns present in the log (session
        always; group, onset, reveal_onset only when given), the measures
        asked for, plus ``stimulus_idx``, ``response_idx`` (-1 = missed),
        ``missed``, ``rt_ok`` and ``rt_flag`` (one of :data:`RT_FLAGS`); rt in
        seconds; rows sorted by participant, session, block and trial.
    task : Task
        The task it was validated against.
    source : str
        The file, folder, glob or BIDS dataset as given (or "<frame>").
    rt_unit : str
        The unit the log's rt column was read in.
    screen : RTScreen
        The RT screen applied.
    read_warnings : tuple of str
        What reading found (columns read loosely or ignored, personal data,
        label fixes, unit doubts, impossible stimuli, ...).
    screen_warnings : tuple of str
        What screening found.
    labels_fixed : mapping of str to int
        Participant -> number of rows whose labels were fixed.
    sources : tuple of str
        Every file read, in reading order (empty for an in-memory frame):
        the inputs whose SHA-256 a manifest records.
    mapped : tuple of str
        What a profile and file names mapped, one plain line each (empty
        without either).
    """

    frame: pd.DataFrame
    task: Task
    source: str
    rt_unit: str
    screen: RTScreen
    read_warnings: tuple[str, ...] = ()
    screen_warnings: tuple[str, ...] = ()
    labels_fixed: Mapping[str, int] = field(default_factory=dict)
    sources: tuple[str, ...] = ()
    mapped: tuple[str, ...] = ()

    @property
    def warnings(self) -> tuple[str, ...]:
        """Return every warning: reading first, then screening."""
        return self.read_warnings + self.screen_warnings

    @property
    def participants(self) -> list[str]:
        """Return the participant ids in sorted order."""
        return sorted(self.frame["participant"].unique().tolist())

    def __len__(self) -> int:
        return len(self.frame)


def load_log(source: str | Path, task: Task | str | Path, *, profile: object = None,
             name_pattern: str | None = None, columns: Mapping[str, str] | None = None,
             rt_unit: str | None = None, fix_labels: bool | None = None, screen: RTScreen = RTScreen(),
             measures: Sequence[str] = ()) -> ValidatedLog:
    """Return the validated, screened log of a file, a folder or glob of files, or a BIDS dataset.

    Parameters
    ----------
    source : str or pathlib.Path
        A file: CSV (``.csv``), TSV (``.tsv``, ``.tab``), a JSON array of
        trial objects (``.json``), a spreadsheet (``.xlsx``, with openpyxl),
        Parquet (``.parquet``, ``.pq``, with pyarrow) or, for any other
        extension, text whose delimiter (comma, tab, semicolon, vertical bar)
        is detected. A folder (its log files), a glob (``"data/*.csv"``) or
        the root of a BIDS dataset (a folder with dataset_description.json:
        its ``beh`` or ``events`` files, :func:`foretell.bids.find_bids_files`).
        Many files are read in the order of their paths into one log. Files
        are only read.
    task : Task, str or pathlib.Path
        The task, a task file or the name of a shipped task.
    profile : str, pathlib.Path, mapping or Profile, optional
        The lab profile (:func:`foretell.profiles.load_profile`): column map,
        RT unit, value maps, no-response codes, zero-based counters, rows to
        leave out, name pattern. The arguments below, when given, take
        precedence (``columns`` is merged over the profile's map).
    name_pattern : str, optional
        Ids from the file names, e.g. ``"{participant}_ses-{session}_*.csv"``
        (:func:`foretell.logsets.name_regex`); it also chooses the files.
    columns, fix_labels, screen, measures
        As in :func:`validate_log`.
    rt_unit : {"s", "ms"}, optional
        The unit of the rt column (default: the profile's, else seconds).

    Returns
    -------
    ValidatedLog
        ``sources`` lists every file read; ``mapped`` says what the profile
        and the names mapped.

    Raises
    ------
    LogError
        Listing every problem found, each with file, line and column: also a
        pattern that matches no file, a participant and session in two
        files, files that lack a column the others have, a value with no
        entry in the profile's value map.
    InputError
        For a profile file that is not valid (naming its line).
    UsageError
        For arguments that are not as described.

    Examples
    --------
    >>> log = load_log("study.csv", "lantern-relay", columns={"response": "guess"})  # doctest: +SKIP
    >>> log = load_log("data/", "lantern-relay", profile="lab.toml")  # doctest: +SKIP
    >>> log.frame, log.warnings, log.sources  # doctest: +SKIP
    """
    if not isinstance(source, (str, Path)) or not str(source).strip():
        raise UsageError(f"source must be a log file, a folder, a glob or a BIDS dataset, got {source!r}")
    task, options = _options(task, columns, rt_unit, fix_labels, screen, measures, profile)
    return _validated(_read_source(source, options, name_pattern), task, str(source), options)


def validate_log(frame: pd.DataFrame, task: Task | str | Path, source: str = "<frame>",
                 columns: Mapping[str, str] | None = None, rt_unit: str | None = None,
                 fix_labels: bool | None = None, *, screen: RTScreen = RTScreen(),
                 measures: Sequence[str] = (), profile: object = None) -> ValidatedLog:
    """Return the validated, screened log of an in-memory log ``frame``.

    Required columns are participant, block, trial, stimulus and response;
    session defaults to 1. Session, block and trial are whole numbers below
    2**53 in magnitude. Trials are ordered within participant x session by
    block, then trial number, so trials counted through the session (1..600)
    and trials that restart in every block (1..120 in each) are both
    accepted; within a block the rows may come in any trial order. Only a
    true duplicate (the same participant, session, block and trial twice) is
    refused. Blocks must not decrease down the file within participant x
    session. An empty response is a missed guess (kept, flagged); an empty
    or absent rt is no RT. Ids and labels may not hold control characters;
    participant and group ids hold at most
    :data:`foretell.labels.MAX_LABEL_LENGTH` characters (they name output
    files). Stimuli that the task's source gives probability 0 after their
    past are warned about, naming the participant, the first such line and
    the context. Row ``i`` of ``frame`` is reported as line ``i + 2``, as if
    the frame were a file with a header line.

    Parameters
    ----------
    frame : pandas.DataFrame
        The log, one row per trial; it is not modified.
    task : Task, str or pathlib.Path
        The task, a task file or the name of a shipped task.
    source : str, default "<frame>"
        What the messages call the log.
    columns : mapping of str to str, optional
        Canonical name (:data:`CANONICAL`) -> the lab's own column name, e.g.
        ``{"response": "guess", "rt": "RT_ms"}``; problems name the lab's
        column. Names match regardless of letter case and surrounding spaces
        (with a warning).
    rt_unit : {"s", "ms"}, optional
        The unit of the rt column (default: the profile's, else seconds).
        Participants whose median RT is implausible in that unit are named
        in a warning.
    fix_labels : bool, optional
        Fix (and report) labels that differ from a task symbol only by stray
        spaces or letter case, and ids with stray spaces; otherwise they are
        problems (default: the profile's, else False).
    screen : RTScreen
        The RT screen (:func:`screen_rt`).
    measures : sequence of str
        Other numeric per-trial columns to carry over (e.g. a single-trial
        EEG amplitude, for :func:`foretell.steps.measures.analyze_rt`); their
        cells must be numbers or empty (NaN).
    profile : str, pathlib.Path, mapping or Profile, optional
        A lab profile (see :func:`load_log`) applied to the frame's columns.

    Returns
    -------
    ValidatedLog
        Other columns of the log are not carried over (a warning names them).

    Raises
    ------
    LogError
        Listing every problem found, each with line and column.
    UsageError
        For arguments that are not as described.
    """
    if not isinstance(frame, pd.DataFrame):
        raise UsageError(f"validate_log takes a pandas DataFrame, got {type(frame).__name__}; "
                         "use load_log for a file")
    task, options = _options(task, columns, rt_unit, fix_labels, screen, measures, profile)
    table = LogTable(cells=frame, lines=np.arange(len(frame)) + 2,
                     files=np.full(len(frame), str(source), dtype=object), sources=())
    return _validated(table, task, str(source), options)


def _options(task: object, columns: object, rt_unit: object, fix_labels: object, screen: object,
             measures: object, profile: object) -> tuple[Task, dict[str, object]]:
    """Return the task and the checked options of a validation (the profile's, with the arguments on top)."""
    from .inputs import as_task  # inputs imports this module

    profile = as_profile(profile) or Profile()
    rt_unit = rt_unit if rt_unit is not None else profile.rt_unit or "s"
    fix_labels = fix_labels if fix_labels is not None else bool(profile.fix_labels)
    check_option("rt_unit", rt_unit, tuple(RT_UNITS))
    if not isinstance(fix_labels, (bool, np.bool_)):
        raise UsageError(f"fix_labels must be True or False, got {fix_labels!r}")
    if not isinstance(screen, RTScreen):
        raise UsageError(f"screen must be an RTScreen, got {type(screen).__name__}")
    if not isinstance(measures, (list, tuple)) or not all(isinstance(m, str) for m in measures):
        raise UsageError(f"measures must be a list of column names, got {measures!r}: "
                         "write measures=[name]")
    clash = [m for m in measures if m in CANONICAL or m in DERIVED]
    if clash:
        raise UsageError(f"measure column(s) {', '.join(map(repr, clash))} would shadow a column "
                         "foretell computes or reads: rename them")
    merged = {**profile.columns, **check_column_map(columns)}
    return as_task(task), {"columns": check_column_map(merged), "rt_unit": rt_unit,
                           "fix_labels": bool(fix_labels), "screen": screen, "measures": tuple(measures),
                           "profile": profile}


def _read_source(source: str | Path, options: dict[str, object], name_pattern: str | None) -> LogTable:
    """Return the cells of every file of ``source``: a BIDS dataset, or files chosen by a name pattern."""
    profile: Profile = options["profile"]
    columns = dict(options["columns"])
    pattern = name_pattern if name_pattern is not None else profile.name_pattern
    if pattern is None and is_bids_root(source):
        warnings = []
        files, notes = find_bids_files(source, files=profile.bids_files, task=profile.bids_task,
                                       group_column=columns.get("group", "group"))
    else:
        files, warnings, notes = find_log_files(source, pattern)
    named = sorted({k for f in files for k in f.ids} & set(columns))
    if named and any(columns[k] != k for k in named):
        raise UsageError(f"{' and '.join(named)} would come both from the file names and from column "
                         f"{columns[named[0]]!r}: drop it from the column map, or the placeholder from the pattern")
    wanted = [columns.get(c, c) for c in CANONICAL] + list(options["measures"]) + [r.column for r in profile.rows]
    table = read_log_files(files, names=[*CANONICAL, *columns.values()], wanted=wanted, sheet=profile.sheet)
    return replace(table, warnings=(*warnings, *table.warnings), notes=tuple(notes))


def _validated(table: LogTable, task: Task, source: str, options: dict[str, object]) -> ValidatedLog:
    """Return the validated, screened log of a table read from one file, many files or a frame.

    ``options`` come from :func:`_options`; problems name each row's file
    when the table holds several.
    """
    profile: Profile = options["profile"]
    cells, lines, files, mapped = profile.apply(table.cells, table.lines, table.files, options["columns"],
                                                task.symbols)
    frame, warnings, fixed = check_cells(cells, lines, task, table.sources[0] if table.sources else source,
                                         options["columns"], options["rt_unit"], options["fix_labels"],
                                         options["measures"], files=files if len(table.sources) > 1 else None)
    said = [*profile.summary(options["columns"], options["rt_unit"]), *table.notes, *mapped] \
        if (profile.path or profile.columns or mapped or table.notes) else []
    log = ValidatedLog(frame, task, source, options["rt_unit"], options["screen"],
                       (*table.warnings, *warnings), labels_fixed=fixed, sources=table.sources,
                       mapped=tuple(said))
    return screen_rt(log, options["screen"])


def screen_rt(log: ValidatedLog, screen: RTScreen = RTScreen()) -> ValidatedLog:
    """Return a copy of a validated log with ``rt_ok`` and ``rt_flag`` set by ``screen``.

    Flags, first match wins: "missed" (no guess; any RT ignored), "no-rt",
    "fast" (below the floor), "slow" (above the ceiling), "mad" (the
    per-participant log-RT rule, over the RTs that passed floor and ceiling).
    "" means usable: ``rt_ok`` is ``rt_flag == ""``. No row is ever removed.

    Parameters
    ----------
    log : ValidatedLog
    screen : RTScreen

    Returns
    -------
    ValidatedLog
        With the new flags, ``screen`` and its ``screen_warnings`` (which
        replace the earlier screen's).

    Raises
    ------
    UsageError
        When ``log`` is not a validated log or ``screen`` not an RTScreen.
    """
    _check_log("screen_rt", log)
    if not isinstance(screen, RTScreen):
        raise UsageError(f"screen must be an RTScreen, got {type(screen).__name__}")
    frame = log.frame
    rt = frame["rt"].to_numpy(dtype=float)
    missed = frame["missed"].to_numpy(dtype=bool)
    has_rt = ~missed & ~np.isnan(rt)
    fast = has_rt & ((rt < screen.floor) | (rt <= 0))
    slow = has_rt & ~fast & (rt > screen.ceiling)
    flag = np.full(len(frame), "", dtype=object)
    flag[slow] = "slow"
    flag[fast] = "fast"
    flag[~missed & ~has_rt] = "no-rt"
    flag[missed] = "missed"
    warnings: list[str] = []
    if screen.mad_k is not None:
        mad_out, flat = _mad_outliers(frame["participant"].to_numpy(), rt, flag == "",
                                      screen.mad_k)
        flag[mad_out] = "mad"
        warnings += [f"participant {p}: the MAD of their {plural(n, 'log RT')} is 0, so the MAD "
                     "rule flags none of their trials" for p, n in flat.items()]
    out = frame.copy()
    out["rt_ok"] = flag == ""
    out["rt_flag"] = pd.Series(flag, index=out.index, dtype="str")
    return replace(log, frame=out, screen=screen, screen_warnings=tuple(warnings))


def log_summary(log: ValidatedLog, totals: bool = True) -> pd.DataFrame:
    """Return the validation summary of a validated log, one row per participant.

    Parameters
    ----------
    log : ValidatedLog
    totals : bool, default True
        Add a last row with participant "all" (the whole log): its
        ``sessions`` and ``blocks`` count the distinct session numbers and
        session x block pairs of the log (not a sum over participants, who
        share them); every other count is the sum over participants.

    Returns
    -------
    pandas.DataFrame
        Columns participant, group (NA without a group column), sessions,
        blocks (distinct session x block), trials, missed, missed_with_rt
        (missed guesses that carry an RT, ignored), rt_missing, rt_fast,
        rt_slow, rt_mad (trials flagged by the screen, see
        :func:`screen_rt`), rt_usable, labels_fixed.

    Raises
    ------
    UsageError
        When ``log`` is not a validated log.
    """
    _check_log("log_summary", log)
    frame = log.frame
    part = frame["participant"]
    flag = frame["rt_flag"]

    def count(mask: pd.Series) -> pd.Series:
        return mask.groupby(part).sum().astype("int64")

    group = (frame.groupby("participant")["group"].first() if "group" in frame.columns
             else pd.Series(pd.NA, index=pd.Index(sorted(part.unique())), dtype="str"))
    fixed = log.labels_fixed
    table = pd.DataFrame({
        "group": group,
        "sessions": frame.groupby("participant")["session"].nunique(),
        "blocks": frame.drop_duplicates(["participant", "session", "block"])
                       .groupby("participant").size(),
        "trials": frame.groupby("participant").size(),
        "missed": count(frame["missed"]),
        "missed_with_rt": count(frame["missed"] & frame["rt"].notna()),
        "rt_missing": count(flag == "no-rt"),
        "rt_fast": count(flag == "fast"),
        "rt_slow": count(flag == "slow"),
        "rt_mad": count(flag == "mad"),
        "rt_usable": count(frame["rt_ok"]),
    })
    table["labels_fixed"] = [int(fixed.get(p, 0)) for p in table.index]
    table = table.rename_axis("participant").reset_index()
    table["participant"] = table["participant"].astype("str")
    if totals:
        counts = table.columns[2:]
        distinct = {"sessions": frame["session"].nunique(),
                    "blocks": len(frame.drop_duplicates(["session", "block"]))}
        total = pd.DataFrame({"participant": [ALL], "group": [pd.NA],
                              **{c: [distinct.get(c, table[c].sum())] for c in counts}})
        table = pd.concat([table, total.astype(table.dtypes.to_dict())], ignore_index=True)
    return table


def unscorable(log: ValidatedLog, warmup: int) -> pd.DataFrame:
    """Return the participants none of whose trials can be scored.

    A trial is scored when its guess is not missed and it is at position
    ``warmup`` or later of its session (positions count from 0 in the order of
    block and trial; the first ``warmup`` trials of every session are warm-up,
    as in the fits). A participant who always guesses the same symbol is scorable.

    Parameters
    ----------
    log : ValidatedLog
    warmup : int
        Warm-up trials per session (>= 0).

    Returns
    -------
    pandas.DataFrame
        Columns participant, reason: "every guess missed", or "no guess after
        the first {warmup} trials of a session (warm-up)".

    Raises
    ------
    UsageError
        When ``log`` is not a validated log or ``warmup`` not a whole number >= 0.
    """
    _check_log("unscorable", log)
    if isinstance(warmup, float):
        raise UsageError(f"warmup must be a whole number of trials >= 0, got {warmup!r}")
    warmup = check_count("warmup", warmup, 0)
    frame = log.frame
    position = frame.groupby(["participant", "session"], sort=False).cumcount().to_numpy()
    guessed = ~frame["missed"].to_numpy(dtype=bool)
    per = pd.DataFrame({"participant": frame["participant"], "guessed": guessed,
                        "scored": guessed & (position >= warmup)}).groupby("participant").any()
    lost = per[~per["scored"]]
    reason = np.where(lost["guessed"], f"no guess after the first {int(warmup)} trials of a "
                      "session (warm-up)", "every guess missed")
    return pd.DataFrame({"participant": pd.array(lost.index.to_numpy(), dtype="str"),
                         "reason": pd.array(reason, dtype="str")})


def _mad_outliers(part: np.ndarray, rt: np.ndarray, eligible: np.ndarray,
                  k: float) -> tuple[np.ndarray, dict[str, int]]:
    """Return the rows beyond k scaled MADs of their participant's median log RT.

    Only ``eligible`` rows enter the median and the MAD and can be flagged;
    also returns the participants whose MAD is 0 (nothing flagged for them) with
    their number of eligible RTs.
    """
    log_rt = pd.Series(np.where(eligible, np.log(np.where(eligible, rt, 1.0)), np.nan))
    dev = (log_rt - log_rt.groupby(part).transform("median")).abs()
    mad = _MAD_SCALE * dev.groupby(part).transform("median")
    out = (eligible & (dev > k * mad) & (mad > 0)).to_numpy()
    flat = pd.Series(part[eligible & (mad == 0).to_numpy()]).value_counts().sort_index()
    return out, {str(p): int(n) for p, n in flat.items()}


def _check_log(what: str, log: object) -> None:
    """Raise UsageError unless ``log`` is a validated log."""
    if not isinstance(log, ValidatedLog):
        raise UsageError(f"{what} needs a validated log, got {type(log).__name__}: use load_log or "
                         "validate_log first")
