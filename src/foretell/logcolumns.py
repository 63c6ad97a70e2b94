"""The columns of a response log: canonical names, the lab's own names, look-alikes and personal data."""

from __future__ import annotations

import difflib
import re
import shlex
from collections.abc import Mapping, Sequence
from dataclasses import replace

from .errors import Problem, UsageError

CANONICAL = ("participant", "group", "session", "block", "trial", "stimulus",
             "response", "rt", "onset", "reveal_onset")
"""The columns foretell reads from a log, in the order of its tables."""
REQUIRED = ("participant", "block", "trial", "stimulus", "response")
"""The columns every log must have."""
_IDENTIFYING = re.compile(
    r"(^|_)(first_?|last_?|full_?|sur|fore|given_?|family_?)?name($|_)"
    r"|e_?mail|birth|(^|_)dob($|_)|address|phone|mobile")
_NAMES_A_THING = re.compile(r"(^|_)(exp|experiment|study|project|task|file|image|img|stim|stimulus|sound|"
                            r"condition|block|routine|session|host|computer|device|program)_?name($|_)")
"""Column names with "name" that name a thing, not a person (an experiment's, a file's, ...)."""


def check_column_map(columns: object) -> dict[str, str]:
    """Return the column map as a dict after checking it.

    Parameters
    ----------
    columns : mapping or None
        Canonical name (:data:`CANONICAL`) -> the log's own column name, e.g.
        ``{"response": "guess"}``.

    Returns
    -------
    dict of str to str

    Raises
    ------
    UsageError
        When ``columns`` is not a mapping of names, names an unknown
        canonical column, maps one column to two canonical ones, or reads a
        canonical column from another canonical column that is itself read.
    """
    if columns is None:
        return {}
    if not isinstance(columns, Mapping) or not all(isinstance(k, str) and isinstance(v, str)
                                                   for k, v in columns.items()):
        raise UsageError("columns must be a mapping of canonical names to your column names, e.g. "
                         f"{{'response': 'guess'}}; got {type(columns).__name__} {columns!r:.80}")
    columns = dict(columns)
    unknown = sorted(set(columns) - set(CANONICAL))
    if unknown:
        close = difflib.get_close_matches(unknown[0], CANONICAL, n=1)
        hint = f" (did you mean '{close[0]}'?)" if close else ""
        raise UsageError(f"unknown canonical column(s) {', '.join(map(repr, unknown))} in the "
                         f"column map{hint}; the canonical columns are {', '.join(CANONICAL)}")
    theirs = list(columns.values())
    twice = sorted({c for c in theirs if theirs.count(c) > 1})
    if twice:
        raise UsageError(f"column(s) {', '.join(map(repr, twice))} mapped to more than one "
                         f"canonical column")
    names = {canon: columns.get(canon, canon) for canon in CANONICAL}
    used = [c for c, name in names.items()
            if name != c and name in CANONICAL and names[name] == name]
    if used:
        raise UsageError("column map reads " + ", ".join(f"'{c}' from '{names[c]}'" for c in used)
                         + ", which is itself a canonical column: map that one to another column too")
    return columns


def resolve_columns(header: Sequence[str], columns: Mapping[str, str], source: str,
                    measures: Sequence[str] = ()) -> tuple[dict[str, str], list[Problem], list[str]]:
    """Return which of the log's columns holds each canonical column, with the problems and warnings.

    A canonical (or mapped) name matches a column of the log exactly, else
    regardless of letter case and surrounding spaces ("RT" and " rt " are
    read as "rt", with a warning saying so). A column that looks like a
    canonical one but is not read is named in a warning, never ignored
    silently; two look-alikes of one name are a problem.

    Parameters
    ----------
    header : sequence of str
        The log's column names.
    columns : mapping of str to str
        The checked column map (:func:`check_column_map`).
    source : str
        The file, for the problems (all on line 1).
    measures : sequence of str
        Other columns the caller reads (not reported as ignored).

    Returns
    -------
    (dict, list of Problem, list of str)
        Canonical name -> the log's column name for the columns found; the
        problems (missing required columns, ambiguous look-alikes); the
        warnings (names read loosely, look-alikes, ignored and personal-data
        columns).
    """
    header = [str(c) for c in header]
    wanted = {canon: columns.get(canon, canon) for canon in CANONICAL}
    present = {canon: name for canon, name in wanted.items() if name in header}
    problems: list[Problem] = []
    warnings: list[str] = []
    for canon, name in wanted.items():
        if canon in present:
            continue
        alike = [c for c in header if _loose(c) == _loose(name) and c not in present.values()]
        if len(alike) == 1:
            present[canon] = alike[0]
            warnings.append(f"column {alike[0]!r} read as {canon!r}")
        elif alike:
            problems.append(Problem(
                f"columns {', '.join(map(repr, alike))} all look like '{name}': rename all but one, "
                f"or choose one with columns={{'{canon}': {alike[0]!r}}} (CLI: --map "
                f"{shlex.quote(f'{canon}={alike[0]}')})", source, 1, alike[0]))
    extra = [c for c in header if c not in present.values()]
    problems += _missing(header, extra, wanted, present, source)
    lookalikes = {c: canon for c in extra if c not in measures for canon in CANONICAL
                  if canon in present and _loose(c) in (canon, _loose(wanted[canon]))}
    warnings += [f"column {c!r} looks like '{canon}' but {present[canon]!r} was read; {c!r} was ignored"
                 for c, canon in lookalikes.items()]
    personal = [c for c in extra if _looks_identifying(c)]
    if personal:
        warnings.append(f"{_columns(personal)} {_verb(personal, 'looks', 'look')} like personal data "
                        f"and {_verb(personal, 'was', 'were')} not loaded; do not share the file "
                        "they came from")
    ignored = [c for c in extra if c not in personal and c not in measures and c not in lookalikes]
    if ignored:
        warnings.append(f"{_columns(ignored)} {_verb(ignored, 'is', 'are')} not part of the log "
                        f"format and {_verb(ignored, 'was', 'were')} ignored")
    if "participant" in present and _looks_identifying(present["participant"]):
        warnings.append(f"participant ids come from column '{present['participant']}', "
                        "which sounds identifying: use pseudonymous ids")
    return present, problems, warnings


def _missing(header: list[str], extra: list[str], wanted: dict[str, str], present: dict[str, str],
             source: str) -> list[Problem]:
    """Return a problem per missing required column, suggesting the closest of the unread columns.

    With two or more missing, the first also points to a lab profile, which maps them once.
    """
    problems = []
    for canon in REQUIRED:
        if canon in present:
            continue
        name = wanted[canon]
        near = (difflib.get_close_matches(name, extra, n=1)
                or difflib.get_close_matches(name.casefold(), [c.casefold() for c in extra], n=1))
        if near and near[0] not in extra:  # a case-folded match: back to the log's spelling
            near = [c for c in extra if c.casefold() == near[0]]
        mine = near[0] if near else "<your column>"
        hint = f"; the closest is {near[0]!r}" if near else ""
        option = shlex.quote(f"{canon}={mine}") if near else f"{canon}={mine}"
        alias = f" (canonical '{canon}')" if name != canon else ""
        problems.append(Problem(
            f"missing required column '{name}'{alias}; the log has "
            f"{', '.join(map(repr, header))}{hint}: map a column with "
            f"columns={{'{canon}': {mine!r}}} (CLI: --map {option})",
            source, 1, name))
    if len(problems) > 1:
        problems[0] = replace(problems[0], message=problems[0].message + (
            "; a lab profile maps all of a layout's columns once: profile='lab.toml' (CLI: --profile "
            "lab.toml; foretell profile --from FILE writes one to check)"))
    return problems


def _loose(name: str) -> str:
    """Return a column name without surrounding spaces, case-folded."""
    return name.strip().casefold()


def _columns(names: list[str]) -> str:
    """Return "column 'a'" or "columns 'a', 'b'"."""
    return ("column " if len(names) == 1 else "columns ") + ", ".join(map(repr, names))


def _verb(items: Sequence[object], singular: str, plural_form: str) -> str:
    """Return the verb form that agrees with the number of ``items``."""
    return singular if len(items) == 1 else plural_form


def _looks_identifying(name: str) -> bool:
    """Return whether a column name looks like it holds personal data (name, email, ...)."""
    snake = re.sub(r"[^a-z0-9]+", "_", re.sub(r"([a-z0-9])([A-Z])", r"\1_\2", name).lower())
    return bool(_IDENTIFYING.search(snake)) and not _NAMES_A_THING.search(snake)
