"""BIDS in and out: the behavioural or events files of a BIDS dataset as a log, and results as a BIDS derivatives dataset.

Reading needs no BIDS library: the files are found by two fixed patterns and
named by their entities (BIDS, "Common principles: filenames"); the
derivatives follow the specification's derivatives rules.
"""

from __future__ import annotations

import re
from collections.abc import Iterable, Mapping
from pathlib import Path
from typing import TYPE_CHECKING

import pandas as pd

from .errors import LogError, Problem, UsageError
from .labels import ALL
from .logread import LogFile, read_log_cells
from .text import plural

if TYPE_CHECKING:
    from .results import Result

DESCRIPTION = "dataset_description.json"
"""The file every BIDS dataset has at its root."""
MISSING = "n/a"
"""How BIDS tabular files write a missing value."""
BIDS_VERSION = "1.10.0"
"""The BIDS version the derivatives say they follow."""
PIPELINE = "foretell"
"""The pipeline's folder under ``derivatives/`` and its name in ``GeneratedBy``."""
_PATTERNS = {"beh": ("sub-*/beh/*_beh.tsv", "sub-*/ses-*/beh/*_beh.tsv"),
             "events": ("sub-*/*/*_events.tsv", "sub-*/ses-*/*/*_events.tsv")}
_ENTITY = re.compile(r"([A-Za-z0-9]+)-([A-Za-z0-9]+)")
_BLOB = re.compile(r"sub-([A-Za-z0-9]+)(?:_ses-([A-Za-z0-9]+))?_.*\.(tsv|json)")


def is_bids_root(path: str | Path) -> bool:
    """Return whether ``path`` is the root of a BIDS dataset (a folder holding dataset_description.json).

    Raises
    ------
    LogError
        For a folder that holds ``sub-*`` folders but no dataset_description.json.
    """
    folder = Path(path)
    if not folder.is_dir():
        return False
    if (folder / DESCRIPTION).is_file():
        return True
    if any(p.is_dir() and p.name.startswith("sub-") for p in folder.iterdir()):
        raise LogError(Problem(f"this folder holds sub-* folders like a BIDS dataset but no {DESCRIPTION}, "
                               "which BIDS requires at the root: add it (with Name and BIDSVersion), or "
                               "give a name pattern to read the files as a plain folder", str(folder)))
    return False


def entities(name: str) -> dict[str, str]:
    """Return the entities and the suffix of a BIDS file name.

    Parameters
    ----------
    name : str
        e.g. ``sub-01_ses-2_task-lanterns_beh.tsv``.

    Returns
    -------
    dict
        Entity key -> label (``sub``, ``ses``, ``task``, ``run``, ...) and
        ``suffix`` (the part after the last '_', without the extension).

    Examples
    --------
    >>> entities("sub-01_ses-2_task-lanterns_beh.tsv")
    {'sub': '01', 'ses': '2', 'task': 'lanterns', 'suffix': 'beh'}
    """
    stem = name.split(".", 1)[0]
    *pairs, suffix = stem.split("_")
    out = {m.group(1): m.group(2) for m in map(_ENTITY.fullmatch, pairs) if m}
    return out | {"suffix": suffix}


def find_bids_files(root: str | Path, *, files: str | None = None, task: str | None = None,
                    group_column: str = "group") -> tuple[list[LogFile], list[str]]:
    """Return the behavioural (or events) files of a BIDS dataset as the files of one log.

    Parameters
    ----------
    root : str or pathlib.Path
        The dataset's root.
    files : {"beh", "events"}, optional
        ``sub-*/[ses-*/]beh/*_beh.tsv``, or the ``*_events.tsv`` of any data
        type (beside the EEG); by default the beh files, else the events files.
    task : str, optional
        The task label to read (needed when the dataset holds several).
    group_column : str, default "group"
        The column of ``participants.tsv`` that gives each participant's group.

    Returns
    -------
    (list of LogFile, list of str)
        The files sorted by path, each with its participant (the ``sub``
        label), session (the ``ses`` label) and group, and ``n/a`` read as
        empty; notes saying what was read.

    Raises
    ------
    LogError
        No such files, several tasks and none chosen, a participant missing
        from participants.tsv.
    """
    folder = Path(root)
    kinds = [files] if files else ["beh", "events"]
    found: list[Path] = []
    for kind in kinds:
        found = sorted({p for pattern in _PATTERNS[kind] for p in folder.glob(pattern) if p.is_file()},
                       key=lambda p: p.as_posix())
        if found:
            break
    if not found:
        wanted = " or ".join(p for kind in kinds for p in _PATTERNS[kind])
        raise LogError(Problem(f"the BIDS dataset has no files {wanted}", str(folder)))
    tasks = sorted({entities(p.name).get("task", "") for p in found})
    if task is not None:
        found = [p for p in found if entities(p.name).get("task") == task]
        if not found:
            raise LogError(Problem(f"the BIDS dataset has no {kind} files of task {task!r}; its tasks are "
                                   f"{', '.join(tasks)}", str(folder)))
    elif len(tasks) > 1:
        raise LogError(Problem(f"the BIDS dataset holds the tasks {', '.join(tasks)}: choose one in the profile "
                               f"([bids] task = \"{tasks[0]}\")", str(folder)))
    groups = _groups(folder, group_column)
    out = []
    for path in found:
        named = entities(path.name)
        ids = {"participant": named.get("sub", "")} | ({"session": named["ses"]} if "ses" in named else {})
        if groups is not None:
            if ids["participant"] not in groups:
                raise LogError(Problem(f"participant sub-{ids['participant']} has files but no row here",
                                       str(folder / "participants.tsv"), None, "participant_id"))
            ids["group"] = groups[ids["participant"]]
        out.append(LogFile(path, ids=ids, missing=(MISSING,)))
    chosen = task or tasks[0]
    notes = [f"BIDS dataset {folder}: {plural(len(out), f'{kind} file')}" + (f" of task {chosen!r}" if chosen else "")
             + "; participant and session from their sub- and ses- labels"
             + (f", group from participants.tsv column {group_column!r}" if groups is not None else "")]
    return out, notes


def _groups(folder: Path, column: str) -> dict[str, str] | None:
    """Return participant label -> group from participants.tsv (None without the file or the column)."""
    path = folder / "participants.tsv"
    if not path.is_file():
        return None
    cells, lines = read_log_cells(path, names=("participant_id", column))
    if column not in cells.columns:
        return None
    if "participant_id" not in cells.columns:
        raise LogError(Problem("participants.tsv has no participant_id column", str(path), 1))
    out = {}
    for pid, group, line in zip(cells["participant_id"], cells[column], lines):
        if not str(pid).startswith("sub-"):
            raise LogError(Problem(f"participant_id {pid!r} does not start with 'sub-'", str(path), int(line),
                                   "participant_id"))
        out[str(pid)[4:]] = "" if group == MISSING else str(group)
    return out


def derivatives_folder(root: str | Path) -> Path:
    """Return the folder :func:`write_bids_derivatives` writes: ``root/derivatives/foretell``."""
    return Path(root) / "derivatives" / PIPELINE


def write_bids_derivatives(root: str | Path, result: "Result", *, command: str | None = None,
                           force: bool = False, inputs: Iterable[str | Path] = (),
                           manifest: Mapping[str, object] | None = None) -> Path:
    """Return ``root/derivatives/foretell`` after writing a step's result there as a BIDS derivatives dataset.

    The folder appears whole or not at all, and an existing one is replaced
    only with ``force`` when foretell wrote it (:func:`foretell.outputs.write_outputs`).

    Parameters
    ----------
    root : str or pathlib.Path
        The BIDS dataset (or any folder) under which ``derivatives/foretell/`` is written.
    result : foretell.results.Result
        Any step's result; its tables are written (see Notes).
    command : str, optional
        The command that made the result, for ``GeneratedBy``.
    force : bool, default False
        Replace a ``derivatives/foretell`` that foretell wrote before.
    inputs : iterable of paths
        Files the run read (the output may not be or hold one).
    manifest : mapping, optional
        Provenance merged into foretell's ``manifest.json`` (listed in ``.bidsignore``).

    Returns
    -------
    pathlib.Path

    Raises
    ------
    OutputError
        When the folder may not be written.
    UsageError
        When ``result`` is not a step's result.

    Notes
    -----
    ``dataset_description.json`` holds Name, BIDSVersion, DatasetType
    "derivative" and GeneratedBy (Name, Version, Description with the step
    and the command), the fields the specification requires of a derivatives
    dataset (BIDS, "Derivatives: dataset_description.json"). A table with a
    participant column is split by participant into
    ``sub-<label>/beh/sub-<label>_task-<task>_desc-<table>_beh.tsv`` (labels
    from :func:`foretell.steps.bids.bids_labels`; ``desc`` is the table's
    name, camel-cased); its rows of participant ``all`` and every other
    table go to the top as ``task-<task>_desc-<table>_beh.tsv``. Events
    files of the events step go to ``sub-<label>/[ses-<label>/]beh/``.
    ``participants.tsv`` maps the labels to the participant ids. Files are
    tab-separated with ``n/a`` for missing values.

    Examples
    --------
    >>> result = foretell.fit("bids-study/", "lantern-relay", profile="lab.toml")  # doctest: +SKIP
    >>> write_bids_derivatives("bids-study/", result, command="foretell fit ...")  # doctest: +SKIP
    """
    from .outputs import write_outputs
    from .results import Result

    if not isinstance(result, Result):
        raise UsageError(f"write_bids_derivatives takes a step's result, got {type(result).__name__}")
    record = {**dict(manifest or {}), "step": result.step, "settings": dict(result.settings),
              "notes": list(result.notes), "layout": "BIDS derivatives"}
    return write_outputs(derivatives_folder(root), {}, extra=derivative_files(result, command),
                         manifest=record, inputs=inputs, force=force)


def derivative_files(result: "Result", command: str | None = None) -> dict[str, bytes]:
    """Return every file of the derivatives dataset of a result, by relative name (see :func:`write_bids_derivatives`)."""
    from . import __version__
    from .steps.bids import bids_labels, sidecar_json, to_tsv

    tables = result.tables()
    ids = sorted({str(p) for t in tables.values() if "participant" in t.columns
                  for p in t["participant"].dropna().astype(str).unique() if str(p) != ALL})
    subjects = bids_labels(ids)
    task = bids_labels([result.task.name], empty="task")[result.task.name]
    descs = _desc_labels(list(tables))
    out: dict[str, bytes] = {}
    for stem, table in tables.items():
        name = f"task-{task}_desc-{descs[stem]}_beh.tsv"
        if "participant" not in table.columns:
            out[name] = to_tsv(table)
            continue
        pid = table["participant"].astype(str).to_numpy()
        top = (pid == ALL) | table["participant"].isna().to_numpy()
        if top.any():
            out[name] = to_tsv(table[top].reset_index(drop=True))
        for p in sorted(set(pid[~top])):
            label = subjects[p]
            out[f"sub-{label}/beh/sub-{label}_{name}"] = to_tsv(table[pid == p].reset_index(drop=True))
    for name, data in result.blobs().items():
        match = _BLOB.fullmatch(Path(name).name)
        if match:
            folder = f"sub-{match.group(1)}/" + (f"ses-{match.group(2)}/" if match.group(2) else "")
            out[f"{folder}beh/{Path(name).name}"] = data
    out["participants.tsv"], out["participants.json"] = _participants(tables, ids, subjects)
    steps = f"the {result.step} step" + (f"; command: {command}" if command else ", run from Python")
    out["dataset_description.json"] = sidecar_json({
        "Name": f"{PIPELINE} {result.step} results, task {result.task.name}",
        "BIDSVersion": BIDS_VERSION, "DatasetType": "derivative",
        "GeneratedBy": [{"Name": PIPELINE, "Version": __version__, "Description": steps}]})
    out["README.md"] = (f"# {PIPELINE} {result.step} results\n\nTask {result.task.name!r}. Written by {PIPELINE} "
                        f"{__version__} ({steps}). Per-participant tables are under sub-<label>/beh/, whole-study "
                        "tables at the top; participants.tsv maps labels to the log's ids.\n"
                        + "".join(f"\n- {note}" for note in result.notes) + "\n").encode("utf-8")
    out[".bidsignore"] = b"manifest.json\n"
    return out


def _participants(tables: Mapping[str, pd.DataFrame], ids: list[str],
                  subjects: Mapping[str, str]) -> tuple[bytes, bytes]:
    """Return participants.tsv (participant_id, participant and, when a table gives it, group) and its sidecar."""
    from .steps.bids import sidecar_json, to_tsv

    people = pd.DataFrame({"participant_id": [f"sub-{subjects[p]}" for p in ids], "participant": ids})
    described = {"participant_id": {"Description": "The participant's BIDS label."},
                 "participant": {"Description": "The participant's id in the analysed response log."}}
    groups: dict[str, str] = {}
    for table in tables.values():
        if {"participant", "group"} <= set(table.columns):
            pairs = table[["participant", "group"]].dropna().astype(str).drop_duplicates("participant")
            groups = dict(zip(pairs["participant"], pairs["group"])) | groups
    if groups:
        people["group"] = [groups.get(p) for p in ids]
        described["group"] = {"Description": "The participant's group in the analysed response log."}
    return to_tsv(people), sidecar_json(described)


def _desc_labels(stems: list[str]) -> dict[str, str]:
    """Return each table's name as a ``desc`` label: letters and digits, camel-cased ("fit/winners_block" -> "fitWinnersBlock")."""
    out = {}
    for stem in stems:
        words = [w for w in re.split(r"[^A-Za-z0-9]+", stem) if w]
        out[stem] = (words[0] + "".join(w[:1].upper() + w[1:] for w in words[1:])) if words else "table"
    clash = {label for label in out.values() if list(out.values()).count(label) > 1}
    if clash:
        raise UsageError(f"tables {', '.join(s for s in stems if out[s] in clash)} would share the BIDS "
                         f"label {sorted(clash)[0]!r}")
    return out

