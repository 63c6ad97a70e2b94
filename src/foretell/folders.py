"""The one reader of result folders, and the checked reuse of earlier fits and design checks.

:class:`ResultFolder` reads any folder foretell wrote (or a step's subfolder of
an ``analyze`` output) through its manifest; :func:`as_fit` and
:func:`as_recovery` turn a folder or a result into the result a step reuses,
refusing what was made on another task or log.
"""

from __future__ import annotations

import hashlib
import json
from collections.abc import Mapping
from dataclasses import replace
from pathlib import Path
from typing import TYPE_CHECKING

import pandas as pd

from .errors import InputError, UsageError
from .inputs import same_task
from .outputs import MANIFEST, TOOL
from .text import plural

if TYPE_CHECKING:
    from .logs import ValidatedLog
    from .steps.design import RecoveryResult
    from .steps.guesses import FitResult
    from .tasks import Task

STEP_FOLDERS = {"validation": "validation", "fit": "fit", "rt": "rt", "groups": "groups", "events": "events",
                "eeg": "eeg", "recover": "recovery"}
"""The subfolder of an ``analyze`` output that holds each step's result."""

LABEL_COLUMNS = ("participant", "group", "session", "block", "model", "best_model", "runner_up", "context",
                 "source_context", "response_leaf", "contrast", "reference", "metric", "family", "name",
                 "generating_model", "fitted_model", "note", "reasons", "reason", "at_bound", "message")
"""Columns read as text whatever they hold (participant "007" stays "007", block "all" and 3 alike)."""

FORMER_NAMES = ((("bor",), {"bor": "omnibus_risk"}),
                (("hdi_low",), {"hdi_low": "hdi95_low", "hdi_high": "hdi95_high"}),
                (("d_elpd",), {"elpd": "elpd_loo", "se": "elpd_loo_se", "d_elpd": "elpd_diff",
                               "dse": "elpd_diff_se", "weight": "stacking_weight"}),
                (("parameter", "low"), {"low": "ci95_low", "high": "ci95_high"}),
                (("ci_low",), {"ci_low": "ci95_low", "ci_high": "ci95_high"}))
"""Columns renamed since earlier versions: (columns that together only the old tables hold, old name -> new)."""

FORMER_STATUSES = {"merged": "merged into shorter", "split-deeper": "split into longer", "unvisited": "not visited"}
"""Response-tree statuses (``status`` beside ``response_leaf``) renamed since earlier versions: old -> new."""

FIT_TABLES = ("fits", "blocks", "winners", "selection", "selection_blocks", "families", "families_blocks",
              "contexts", "context_agreement", "excluded")
"""The tables of a ``foretell fit`` output that a FitResult is rebuilt from (trials.csv is optional)."""

RECOVERY_TABLES = ("confusion", "inversion", "params", "recovery_summary", "group_check")
"""The tables of a ``foretell recover`` output."""

FINGERPRINT_COLUMNS = ("participant", "group", "session", "block", "trial", "stimulus", "response")
"""The columns of a validated log that its fingerprint covers (what the guess fits depend on)."""

FIT_FOLDER = "the output folder of foretell fit (or of foretell analyze)"
RECOVERY_FOLDER = "the output folder of foretell recover"
_WHAT = {"fit": FIT_FOLDER, "recover": RECOVERY_FOLDER}
_PARTICIPANT_TABLES = ("fits", "blocks", "winners", "contexts", "context_agreement", "excluded", "predictions")


# --------------------------------------------------------------------------- fingerprints


def _sha256(text: str) -> str:
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


def task_sha256(task: "Task") -> str:
    """Return the SHA-256 of a task's content: alphabet, contexts, probabilities and design (not its name).

    Two tasks with the same fingerprint are the same task for every step
    (:func:`foretell.inputs.same_task`), whatever file they were read from.
    """
    record = {"symbols": list(task.symbols), "contexts": [list(c) for c in task.contexts],
              "next_probs": task.next_probs.tolist(), "response": task.response}
    return _sha256(json.dumps(record, sort_keys=True))


def participant_sha256(log: "ValidatedLog") -> dict[str, str]:
    """Return participant -> SHA-256 of their trials in :data:`FINGERPRINT_COLUMNS`, written as CSV."""
    frame = log.frame.reindex(columns=list(FINGERPRINT_COLUMNS)).astype(object).fillna("")
    return {str(pid): _sha256(rows.to_csv(index=False, lineterminator="\n"))
            for pid, rows in frame.groupby("participant", sort=True)}


def fingerprints(task: "Task", log: "ValidatedLog | None" = None) -> dict[str, object]:
    """Return the manifest record that ties a result to its task (and log): what :func:`as_fit` checks.

    Parameters
    ----------
    task : Task
        The task of the run.
    log : ValidatedLog, optional
        The validated log of the run.

    Returns
    -------
    dict
        ``task_sha256`` (:func:`task_sha256`) and, with a log, ``log_sha256``
        (the SHA-256 of the participants' fingerprints, one ``id digest``
        line each in sorted order) and ``participants_sha256``
        (:func:`participant_sha256`), so that an in-memory log can be
        compared as well as a file.
    """
    record: dict[str, object] = {"task_sha256": task_sha256(task)}
    if log is not None:
        people = participant_sha256(log)
        record["log_sha256"] = _sha256("".join(f"{pid} {digest}\n" for pid, digest in people.items()))
        record["participants_sha256"] = people
    return record


# --------------------------------------------------------------------------- reading a folder


class ResultFolder:
    """A result folder foretell wrote, read through its ``manifest.json``.

    Parameters
    ----------
    path : str or pathlib.Path
        A folder with a foretell ``manifest.json`` or a step's subfolder of an
        ``analyze`` output (``fit/``, ``rt/``, ``recovery/``, ...; its parent
        holds the manifest).

    Attributes
    ----------
    path : pathlib.Path
        The folder.
    manifest : dict
        The manifest (of the parent ``analyze`` output for a step's subfolder).
    step : str
        The step that wrote it (``fit``, ``rt``, ``recover``, ``analyze``, ...).
    settings : dict
        The step's full option set.

    Raises
    ------
    InputError
        When the folder does not exist, or no foretell manifest describes it.

    Examples
    --------
    >>> folder = ResultFolder("results")                      # doctest: +SKIP
    >>> folder.step, folder.table("fits").shape                # doctest: +SKIP
    ('fit', (18, 21))
    """

    def __init__(self, path: str | Path) -> None:
        self.path = Path(path)
        if not self.path.is_dir():
            raise InputError("not a folder: give a folder that foretell wrote", path=str(self.path))
        own = self.path / MANIFEST
        parent = self.path.parent / MANIFEST
        self._within: str | None = None
        if own.is_file():
            self.manifest = _read_manifest(own)
        elif parent.is_file() and self.path.name in STEP_FOLDERS.values():
            self.manifest = _read_manifest(parent)
            self._within = self.path.name
        else:
            raise InputError(f"no {MANIFEST}: not a folder foretell wrote; give a foretell output folder",
                             path=str(self.path))

    def __repr__(self) -> str:
        return f"ResultFolder({str(self.path)!r})"

    @property
    def step(self) -> str:
        """Return the step that wrote the folder (``fit``, ``rt``, ``groups``, ``events``, ``recover``, ``analyze``)."""
        if self._within is not None:
            return next(step for step, folder in STEP_FOLDERS.items() if folder == self._within)
        step = self.manifest.get("step") or self.manifest.get("command") or ""
        return "analyze" if step in ("demo", "analyse") else str(step)

    @property
    def settings(self) -> dict[str, object]:
        """Return the step's options (for a step's subfolder: those the ``analyze`` run recorded for it)."""
        settings = self.manifest.get("settings")
        settings = settings if isinstance(settings, dict) else {}
        if self._within is None:
            return settings
        steps = settings.get("steps")
        own = steps.get(self.step) if isinstance(steps, dict) else None
        return own if isinstance(own, dict) else {}

    @property
    def notes(self) -> tuple[str, ...]:
        """Return the notes the manifest records (none for a step's subfolder)."""
        notes = self.manifest.get("notes") if self._within is None else None
        return tuple(str(n) for n in notes) if isinstance(notes, list) else ()

    @property
    def files(self) -> list[str]:
        """Return the relative names of the folder's files (manifest aside), sorted."""
        names = (p.relative_to(self.path).as_posix() for p in self.path.rglob("*") if p.is_file())
        return sorted(name for name in names if name != MANIFEST)

    def has(self, folder: str) -> bool:
        """Return whether the folder holds the subfolder ``folder`` (a step's folder of an analyze output)."""
        return (self.path / folder).is_dir()

    def sub(self, folder: str) -> "ResultFolder":
        """Return the step's subfolder ``folder`` (``fit``, ``recovery``, ...) of an ``analyze`` output."""
        if not self.has(folder):
            raise InputError(f"holds no {folder}/ folder (the step was skipped or not applicable)",
                             path=str(self.path))
        return ResultFolder(self.path / folder)

    def fingerprint(self, key: str) -> object:
        """Return a fingerprint the manifest records (:func:`fingerprints`), or None."""
        if key in self.manifest:
            return self.manifest[key]
        return self.settings.get(key)

    def text(self, name: str) -> str | None:
        """Return the text file ``name`` (``summary.txt``, ``fit/summary.txt``, ...), or None when absent."""
        path = self.path / name
        return path.read_text(encoding="utf-8") if path.is_file() else None

    def bytes(self, name: str) -> bytes | None:
        """Return the file ``name`` as bytes (figures, posteriors), or None when absent."""
        path = self.path / name
        return path.read_bytes() if path.is_file() else None

    def table(self, name: str) -> pd.DataFrame | None:
        """Return the table ``<name>.csv`` with :data:`LABEL_COLUMNS` as text, or None when absent.

        Floats are read back exactly as written (round trip); an empty cell
        is a missing value. A table written before a rename gets today's
        names (:data:`FORMER_NAMES`, :data:`FORMER_STATUSES`).

        Raises
        ------
        InputError
            When the file is not a readable table (naming the file).
        """
        path = self.path / f"{name}.csv"
        if not path.is_file():
            return None
        try:
            head = pd.read_csv(path, nrows=0).columns
            table = pd.read_csv(path, dtype={c: str for c in LABEL_COLUMNS if c in head},
                                keep_default_na=False, na_values=[""])
        except pd.errors.EmptyDataError:
            raise InputError("empty file: not a table foretell wrote", path=str(path)) from None
        except (pd.errors.ParserError, UnicodeDecodeError, ValueError) as exc:
            raise InputError(f"cannot read this table: {exc}", path=str(path)) from None
        return _current_names(table)

    def require(self, name: str, what: str) -> pd.DataFrame:
        """Return the table ``<name>.csv``; InputError saying the folder is not ``what`` when it is absent."""
        table = self.table(name)
        if table is None:
            raise InputError(f"no {name}.csv: give {what}", path=str(self.path))
        return table

    def input_files(self) -> list[Path]:
        """Return the files whose SHA-256 a run that reads this folder records: manifest, tables, texts."""
        own = self.path / MANIFEST
        tables = [self.path / name for name in self.files if name.endswith((".csv", ".txt"))]
        return ([own] if own.is_file() else [self.path.parent / MANIFEST]) + tables


def _current_names(table: pd.DataFrame) -> pd.DataFrame:
    """Return ``table`` with the columns and statuses an earlier version wrote under today's names."""
    for markers, renames in FORMER_NAMES:
        if set(markers) <= set(table.columns):
            table = table.rename(columns=renames)
    if {"status", "response_leaf"} <= set(table.columns):
        table["status"] = table["status"].replace(FORMER_STATUSES)
    return table


def _read_manifest(path: Path) -> dict[str, object]:
    try:
        record = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, ValueError) as exc:
        raise InputError(f"not a readable manifest: {exc}", path=str(path)) from None
    if not isinstance(record, dict) or record.get("tool") != TOOL:
        raise InputError("not a foretell manifest: give a folder that foretell wrote", path=str(path))
    return record


def step_folder(source: str | Path | ResultFolder, step: str) -> ResultFolder:
    """Return the result folder of ``step`` that ``source`` names.

    Parameters
    ----------
    source : str, pathlib.Path or ResultFolder
        A folder written by ``foretell <step>``, or an ``analyze`` output
        (then its subfolder for the step, :data:`STEP_FOLDERS`).
    step : str
        ``fit`` or ``recover`` (the steps whose results other steps reuse).

    Returns
    -------
    ResultFolder

    Raises
    ------
    InputError
        When the folder was written by another step, or the analyze output
        has no subfolder for the step.
    """
    what = _WHAT[step]
    folder = source if isinstance(source, ResultFolder) else ResultFolder(source)
    if folder.step == "analyze":
        folder = folder.sub(STEP_FOLDERS[step])
    if folder.step != step:
        raise InputError(f"a foretell {folder.step or 'unknown'} output, not {what}: give {what}",
                         path=str(folder.path))
    return folder


def _check_task(folder: ResultFolder, task: "Task", redo: str) -> list[str]:
    """Raise InputError when ``folder`` was made on another task (naming it); return a note when it records none."""
    recorded, where, named = folder.fingerprint("task_sha256"), str(folder.path), folder.settings.get("task")
    if recorded is None:
        return [f"{where} records no task fingerprint (written by an earlier foretell): its task could not "
                "be checked"]
    if recorded != task_sha256(task):
        other = f" ({named})" if isinstance(named, str) and named else ""
        raise InputError(f"made on another task{other}, not {task.name!r}: {redo}", path=where)
    return []


# --------------------------------------------------------------------------- reused fits




def as_fit(fit: object, log: "ValidatedLog | None", task: "Task") -> "FitResult | None":
    """Return earlier fits as a FitResult of this task and log, or None.

    Parameters
    ----------
    fit : None, FitResult, str, pathlib.Path or ResultFolder
        The result of :func:`foretell.fit`, or a folder written by
        ``foretell fit`` (an ``analyze`` output, or its ``fit/`` subfolder,
        is read from its ``fit/`` subfolder). A folder's FitResult is rebuilt
        from its tables; the per-trial predictions come from ``trials.csv``
        when present (else an empty table with the right columns).
    log : ValidatedLog or None
        The log of the step that reuses the fits; None for a step that reads
        no log (the design check draws parameters from fits): then only the
        task is checked.
    task : Task
        The task of that step.

    Returns
    -------
    FitResult or None
        None when ``fit`` is None. Fits of participants that are not in the
        log are dropped, and a note says so; when the fits were made on
        another log (their fingerprint, :func:`fingerprints`, differs) a note
        names the participants whose trials match.

    Raises
    ------
    InputError
        Fits made on another task; a fits table without rows; fits of which
        no participant matches the log.
    UsageError
        ``fit`` of another type.
    """
    from .steps.guesses import FitResult

    if fit is None:
        return None
    if isinstance(fit, FitResult):
        recorded = dict(fit.settings)
        if not same_task(fit.task, task):
            raise InputError(f"made on task {fit.task.name!r}, not {task.name!r}: fit this log with this task",
                             path="the fit result")
        return fit if log is None else _belonging(fit, log, recorded, "the fit result", checked=False)
    if not isinstance(fit, (str, Path, ResultFolder)):
        raise UsageError(f"fit must be a FitResult or {FIT_FOLDER}, got {type(fit).__name__}")
    folder = step_folder(fit, "fit")
    where = str(folder.path)
    notes = _check_task(folder, task, "give the fits made on this task, or fit this log (foretell fit)")
    result = _rebuild_fit(folder, task)
    result = replace(result, notes=result.notes + tuple(notes))
    if log is None:
        return result
    recorded = {key: folder.fingerprint(key) for key in ("log_sha256", "participants_sha256")}
    return _belonging(result, log, recorded, where, checked=True)


def _rebuild_fit(folder: ResultFolder, task: "Task") -> "FitResult":
    """Return the FitResult a ``foretell fit`` folder holds (every participant it fitted)."""
    from .models import model_specs
    from .steps.guesses import FitResult

    fits = folder.require("fits", FIT_FOLDER)
    if fits.empty:
        raise InputError("holds no fits (header only): give a foretell fit output that fitted participants",
                         path=str(folder.path / "fits.csv"))
    tables = {name: folder.require(name, FIT_FOLDER) for name in FIT_TABLES if name != "fits"}
    predictions = folder.table("trials")
    if predictions is None:
        columns = ["participant", "group", "session", "block", "trial", "model",
                   *(f"p_{s}" for s in task.symbols), "guess_prob", "scored"]
        predictions = pd.DataFrame(columns=columns)
    settings = dict(folder.settings)
    models = [str(m) for m in settings.get("models") or dict.fromkeys(fits["model"])]
    return FitResult(task=task, specs=tuple(model_specs(models, task, settings.get("free") or ())),
                     settings=settings, notes=folder.notes, fits=fits, predictions=predictions,
                     summary=(folder.text("summary.txt") or "").rstrip("\n"),
                     lookalikes=tuple(tuple(m) for m in settings.get("lookalikes") or ()), **tables)


def _belonging(result: "FitResult", log: "ValidatedLog", recorded: Mapping[str, object], where: str, *,
               checked: bool) -> "FitResult":
    """Return ``result`` restricted to the log's participants, with notes on what does not match.

    ``recorded`` holds the fits' log fingerprints when known; ``checked``
    says that a missing fingerprint deserves a note (fits read from a folder).
    """
    people = set(log.participants)
    fitted = list(dict.fromkeys(result.fits["participant"].astype(str)))
    if not fitted:
        raise InputError("holds no fits: give fits that fitted participants of this log", path=where)
    kept = [p for p in fitted if p in people]
    matching, notes = _matching(kept, log, recorded, where, checked)
    if not matching:
        raise InputError(f"none of its {plural(len(fitted), 'fitted participant')} ({_shown(fitted)}) "
                         f"{'is' if len(fitted) == 1 else 'are'} in this log with the same trials: "
                         "give the fits made on this log, or fit it (foretell fit)", path=where)
    dropped = [p for p in fitted if p not in people]
    if dropped:
        notes.append(f"{plural(len(dropped), 'fitted participant')} not in this log left out of the reused "
                     f"fits ({_shown(dropped)}); the group-level selection in {where} still counts them")
    excluded = set(result.excluded["participant"].astype(str))
    unfitted = [p for p in log.participants if p not in fitted and p not in excluded]
    if unfitted:
        notes.append(f"{plural(len(unfitted), 'participant')} of this log {'has' if len(unfitted) == 1 else 'have'} "
                     f"no fits in {where} ({_shown(unfitted)})")
    if not notes:
        return result
    tables = {name: getattr(result, name) for name in _PARTICIPANT_TABLES}
    if dropped:
        tables = {name: table[table["participant"].astype(str).isin(people)].reset_index(drop=True)
                  for name, table in tables.items()}
    return replace(result, notes=result.notes + tuple(notes), **tables)


def _matching(kept: list[str], log: "ValidatedLog", recorded: Mapping[str, object], where: str,
              checked: bool) -> tuple[list[str], list[str]]:
    """Return (the fitted participants of the log whose trials match the fits' log, notes saying what differs)."""
    past_log, past = recorded.get("log_sha256"), recorded.get("participants_sha256")
    if past_log is None and not isinstance(past, dict):
        return kept, ([f"the fits in {where} record no log fingerprint: that they were made on this log "
                       "could not be checked"] if checked else [])
    own = fingerprints(log.task, log)
    if past_log == own["log_sha256"]:
        return kept, []
    if not isinstance(past, dict):
        return kept, [f"the fits in {where} were made on another log; which participants match it is not "
                      "recorded"]
    matching = [p for p in kept if past.get(p) == own["participants_sha256"].get(p)]
    differ = [p for p in kept if p not in matching]
    if not differ:
        return matching, []
    return matching, [f"the fits in {where} were made on another log: {plural(len(matching), 'participant')} "
                      f"match it ({_shown(matching)}); {_shown(differ)} had other trials there"]


def _shown(ids: list[str], most: int = 8) -> str:
    """Return up to ``most`` ids joined by commas, and how many more."""
    text = ", ".join(ids[:most])
    return text + (f" and {len(ids) - most} more" if len(ids) > most else "")


# --------------------------------------------------------------------------- reused design checks




def as_recovery(recovery: object, task: "Task") -> "RecoveryResult | None":
    """Return a design check of ``task`` as a RecoveryResult, or None.

    Parameters
    ----------
    recovery : None, RecoveryResult, str, pathlib.Path or ResultFolder
        The result of :func:`foretell.recover`, or a folder written by
        ``foretell recover`` (or the ``recovery/`` subfolder of an
        ``analyze`` output), rebuilt from its tables and ``answer.txt``.
    task : Task
        The task of the analysis it joins.

    Returns
    -------
    RecoveryResult or None

    Raises
    ------
    InputError
        A design check of another task, or a folder without its tables.
    UsageError
        ``recovery`` of another type.
    """
    from .steps.design import RecoveryResult

    if recovery is None:
        return None
    if isinstance(recovery, RecoveryResult):
        if not same_task(recovery.task, task):
            raise InputError(f"a design check of task {recovery.task.name!r}, not {task.name!r}: run the "
                             "design check on this task", path="the recovery result")
        return recovery
    if not isinstance(recovery, (str, Path, ResultFolder)):
        raise UsageError(f"recovery must be a RecoveryResult or {RECOVERY_FOLDER}, got {type(recovery).__name__}")
    folder = step_folder(recovery, "recover")
    notes = _check_task(folder, task, f"run the design check on this task (foretell recover --task {task.name})")
    tables = {name: folder.require(name, RECOVERY_FOLDER) for name in RECOVERY_TABLES}
    return RecoveryResult(task=task, settings=dict(folder.settings), notes=folder.notes + tuple(notes),
                          answer=(folder.text("answer.txt") or "").rstrip("\n"), **tables)
