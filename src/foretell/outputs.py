"""Writing result folders: a whole folder appears at once or not at all, and nothing of the user's is lost.

The rules (refused folders, ``--force``, the lock, atomic renames, stale
leftovers, symbolic links) are those of :func:`reserve` and
:func:`write_outputs`; each is backed by a test in tests/test_outputs.py.
"""

from __future__ import annotations

import contextlib
import fcntl
import hashlib
import json
import os
import shutil
import tempfile
from collections.abc import Iterable, Iterator, Mapping
from pathlib import Path
from typing import TYPE_CHECKING

import pandas as pd

from .errors import OutputError, UsageError
from .text import plural

if TYPE_CHECKING:
    from .results import Result

MANIFEST = "manifest.json"
TOOL = "foretell"
PACKAGES = ("numpy", "scipy", "pandas", "scikit-learn", "statsmodels", "pymc", "arviz", "joblib",
            "matplotlib")
_SHOW_FILES = 5

_held: dict[Path, int] = {}
"""The output folders this process has reserved, with how many reservations are open on each."""


def write(out_dir: str | Path, result: "Result", *, inputs: Iterable[str | Path] = (), force: bool = False,
          manifest: Mapping[str, object] | None = None) -> Path:
    """Return ``out_dir`` after writing any step's result there, atomically, with its manifest.

    Parameters
    ----------
    out_dir : str or pathlib.Path
        The folder to write (see :func:`write_outputs` for what is refused).
    result : foretell.results.Result
        Its tables are written as CSV, its texts as they are, its figures as
        PNG under ``figures/`` (each drawn once, here) and its blobs as bytes.
    inputs : iterable of paths
        Files and folders the run read: the output may not be, hold or lie
        inside any of them.
    force : bool, default False
        Replace a folder foretell wrote before.
    manifest : mapping, optional
        Provenance (:func:`provenance`) merged into the manifest, which also
        records the step, its settings and notes.

    Returns
    -------
    pathlib.Path

    Raises
    ------
    OutputError
        When the folder may not be written (see :func:`write_outputs`).
    UsageError
        When ``result`` is not a step's result.
    """
    from .plots import figure_png
    from .results import Result

    if not isinstance(result, Result):
        raise UsageError(f"write takes a step's result (a foretell Result), got {type(result).__name__}")
    extra = dict(result.blobs())
    for name, draw in result.figure_makers().items():
        figure = draw()
        extra[f"figures/{name}.png"] = figure_png(figure)
    from .folders import fingerprints

    record = {**fingerprints(result.task), **dict(manifest or {}), "step": result.step,
              "settings": dict(result.settings),
              "notes": list(result.notes)}
    return write_outputs(out_dir, result.tables(), texts=result.texts(), manifest=record, inputs=inputs,
                         force=force, extra=extra)


def write_outputs(out_dir: str | Path, tables: Mapping[str, pd.DataFrame], *,
                  texts: Mapping[str, str] | None = None, manifest: Mapping[str, object] | None = None,
                  inputs: Iterable[str | Path] = (), force: bool = False,
                  extra: Mapping[str, bytes] | None = None) -> Path:
    """Return ``out_dir`` after writing every table as ``<name>.csv``, the texts, the files and ``manifest.json``.

    The folder appears whole or not at all: files are written into a hidden
    sibling ``.<name>.<pid>.<random>.partial``, which is renamed into place
    when complete; a folder it replaces is first moved aside to
    ``.<name>.<pid>.old`` and removed last. An interruption (Ctrl-C, SIGTERM)
    leaves the previous folder or nothing. The write holds the lock of
    :func:`reserve` (or runs inside a reservation of this process), so two
    runs never write one folder. Files and folders get the caller's umask.

    Parameters
    ----------
    out_dir : str or pathlib.Path
        The folder. A symbolic link is followed: the results go into its
        target and the link stays.
    tables : mapping of str to pandas.DataFrame
        Written as ``<name>.csv``; a name may contain '/' to write into a subfolder.
    texts : mapping of str to str, optional
        Text files by relative name, written as UTF-8.
    manifest : mapping, optional
        Merged into the manifest, which also names foretell (``"tool"``) and
        gives the SHA-256 of every file written (``"files"``: name -> digest).
    inputs : iterable of paths
        Files the run read (see :func:`check_output_dir`).
    force : bool, default False
        Replace a folder that foretell wrote (see :func:`check_output_dir`).
    extra : mapping of str to bytes, optional
        Other files by relative name (figures, netCDF posteriors, events files).

    Returns
    -------
    pathlib.Path
        ``out_dir`` as given.

    Raises
    ------
    OutputError
        When the folder is refused (:func:`check_output_dir`), another run
        holds it, or the disk refuses a write.
    UsageError
        When a name is absolute or climbs out of the folder with '..', or a
        value is of the wrong type.
    """
    files = _contents(tables, texts or {}, extra or {})
    with reserve(out_dir, inputs=inputs, force=force) as out:
        folder = _folder(out)
        try:
            tmp = Path(tempfile.mkdtemp(prefix=f".{folder.name}.{os.getpid()}.", suffix=".partial",
                                        dir=folder.parent))
            os.chmod(tmp, 0o777 & ~_umask())
        except OSError as exc:
            raise OutputError(f"{out}: cannot create the output folder: {exc.strerror or exc}") from None
        try:
            digests = {name: _write(tmp, name, data) for name, data in files}
            record = {"tool": TOOL, **dict(manifest or {}), "files": dict(sorted(digests.items()))}
            _write(tmp, MANIFEST, (json.dumps(record, indent=2, sort_keys=True, default=str) + "\n")
                   .encode("utf-8"))
            _swap_in(tmp, folder)
        except OSError as exc:
            shutil.rmtree(tmp, ignore_errors=True)
            raise OutputError(f"{out}: cannot write the output: {exc.strerror or exc}") from None
        except BaseException:
            shutil.rmtree(tmp, ignore_errors=True)
            raise
    return out


@contextlib.contextmanager
def reserve(out_dir: str | Path, *, inputs: Iterable[str | Path] = (), force: bool = False) -> Iterator[Path]:
    """Hold an output folder for a whole run: check it, lock it, and keep the lock until the block ends.

    Entering takes an advisory lock (``fcntl.flock``, POSIX) on a hidden
    ``.<name>.lock`` file beside the folder, then tidies what runs that died
    left there (a folder moved aside by a run killed between its two renames
    is put back; half-written folders are removed), then checks the folder
    with :func:`check_output_dir`. :func:`write_outputs` and :func:`write`
    called inside the block write under this lock. Leaving removes the lock
    file, and the parent folders that entering created when nothing was
    written into them. Reservations of one folder nest within a process.

    Parameters
    ----------
    out_dir : str or pathlib.Path
        The output folder (a symbolic link is followed).
    inputs : iterable of paths
        Files the run reads (see :func:`check_output_dir`).
    force : bool, default False
        Whether an existing folder that foretell wrote may be replaced.

    Yields
    ------
    pathlib.Path
        ``out_dir`` as a Path.

    Raises
    ------
    OutputError
        "another foretell run is writing <out>; wait for it or choose another
        folder" when another process holds the folder, or the refusals of
        :func:`check_output_dir`.

    Examples
    --------
    >>> with reserve("results", inputs=["study.csv"]) as out:  # doctest: +SKIP
    ...     result = foretell.fit("study.csv", "lantern-relay")
    ...     write(out, result, inputs=["study.csv"])
    """
    check_output_dir(out_dir, inputs=inputs, force=force)
    out = Path(str(out_dir))
    folder = _folder(out)
    key = Path(os.path.abspath(folder))
    if key in _held:
        _held[key] += 1
        try:
            yield out
        finally:
            _held[key] -= 1
        return
    made = _make_parents(folder.parent, out)
    lock = None
    try:
        lock = _lock(folder, out)
        restored = _tidy(folder)
        try:
            check_output_dir(out_dir, inputs=inputs, force=force)
        except OutputError as err:
            if restored:
                raise OutputError(f"{err} (it was restored from an interrupted earlier run)") from None
            raise
        _held[key] = 1
        try:
            yield out
        finally:
            del _held[key]
    finally:
        if lock is not None:
            _unlock(folder, lock)
        for parent in reversed(made):
            with contextlib.suppress(OSError):
                parent.rmdir()


def check_output_dir(out_dir: str | Path, *, inputs: Iterable[str | Path] = (),
                     force: bool = False) -> Path:
    """Return ``out_dir`` as a Path if results may be written there; raise OutputError if not.

    Call it before long work, so that a refusal comes before the work, not
    after (:func:`reserve` calls it and also holds the folder).

    Parameters
    ----------
    out_dir : str or pathlib.Path
        The output folder (a symbolic link is judged by its target).
    inputs : iterable of paths
        Files and folders the run reads.
    force : bool, default False
        Whether an existing, non-empty folder may be replaced.

    Returns
    -------
    pathlib.Path

    Raises
    ------
    OutputError
        When the folder is empty text, the current folder or one of its
        parents; is, holds or lies inside an input; is a file; or exists and
        is not empty, and ``force`` is off or the folder is not foretell's own
        (it must hold foretell's ``manifest.json``, no file the manifest does
        not list, and no listed file whose SHA-256 has changed: ``--force``
        never deletes a file of the user's).
    UsageError
        When ``inputs`` is a single path instead of a list of paths.
    """
    text = str(out_dir)
    if not text.strip():
        raise OutputError("the output folder name is empty: give a new folder, e.g. --out results")
    out = Path(text)
    folder = _folder(out)
    resolved = folder.resolve()
    here = Path.cwd().resolve()
    if resolved == here or resolved in here.parents:
        raise OutputError(f"{out}: is the current folder or one of its parents; results go into "
                          "a folder of their own, e.g. --out results")
    for source in _input_paths(inputs):
        src = Path(source).resolve()
        if src == resolved or resolved in src.parents:
            raise OutputError(f"{out}: holds the input {source}; choose an output folder that "
                              "holds no input")
        if src.is_dir() and src in resolved.parents:
            raise OutputError(f"{out}: lies inside {source}, a folder this run reads; choose an "
                              "output folder outside it")
    if folder.exists() and not folder.is_dir():
        raise OutputError(f"{out}: exists and is not a folder")
    if folder.is_dir() and any(folder.iterdir()):
        if not force:
            raise OutputError(f"{out}: folder exists and is not empty; pass --force to replace a "
                              "folder that foretell wrote")
        _check_replaceable(folder, out)
    parent = next((p for p in folder.absolute().parents if p.exists()), Path("."))
    if not parent.is_dir():
        raise OutputError(f"{out}: {parent} is not a folder")
    return out


def provenance(command: str, options: Mapping[str, object], inputs: Iterable[str | Path],
               timings: Mapping[str, float] | None = None) -> dict[str, object]:
    """Return the manifest record of a run.

    Parameters
    ----------
    command : str
        The step or command that ran.
    options : mapping
        The full option set, seed included (JSON-ready values).
    inputs : iterable of paths
        The files the run read; the record gives the SHA-256 of each.
    timings : mapping of str to float, optional
        Seconds per part of the run.

    Returns
    -------
    dict
        foretell's version, the command, options, input digests, Python's and
        the main packages' versions, and timings.
    """
    import platform
    from importlib.metadata import PackageNotFoundError, version

    from . import __version__

    packages = {}
    for name in PACKAGES:
        try:
            packages[name] = version(name)
        except PackageNotFoundError:
            continue
    return {"foretell_version": __version__, "command": command, "options": dict(options),
            "inputs": {str(p): file_sha256(p) for p in _input_paths(inputs)},
            "python": platform.python_version(), "packages": packages,
            "timings_s": dict(timings or {})}


def netcdf_bytes(idata: object) -> bytes:
    """Return an ArviZ InferenceData as the bytes of a netCDF file (to write with the other outputs).

    Parameters
    ----------
    idata : arviz.InferenceData

    Returns
    -------
    bytes
    """
    with tempfile.TemporaryDirectory() as folder:
        path = Path(folder) / "posterior.nc"
        idata.to_netcdf(str(path))
        return path.read_bytes()


def file_sha256(path: str | Path) -> str:
    """Return the SHA-256 hex digest of a file's bytes (FIPS 180-4).

    Parameters
    ----------
    path : str or pathlib.Path

    Returns
    -------
    str
        64 lower-case hexadecimal digits.
    """
    digest = hashlib.sha256()
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            digest.update(chunk)
    return digest.hexdigest()


# --- the folder, its lock and its leftovers ---------------------------------------------------

def _folder(out: Path) -> Path:
    """Return the folder results go to: ``out``, or the target of the symbolic link ``out``."""
    if not out.is_symlink():
        return out
    try:
        return out.resolve()
    except (OSError, RuntimeError):  # a loop of links
        raise OutputError(f"{out}: is a symbolic link that leads nowhere (a loop); give a folder") from None


def _input_paths(inputs: Iterable[str | Path]) -> list[str | Path]:
    """Return the inputs as a list; refuse a single path given where a list is expected."""
    if isinstance(inputs, (str, Path)):
        raise UsageError(f"inputs must be a list of paths, got the single path {str(inputs)!r}: "
                         "write inputs=[path]")
    return list(inputs)


def _make_parents(parent: Path, out: Path) -> list[Path]:
    """Create ``parent`` and its missing ancestors; return those created, outermost first."""
    missing = [p for p in [parent, *parent.parents] if not p.exists()][::-1]
    try:
        parent.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise OutputError(f"{out}: cannot create the output folder: {exc.strerror or exc}") from None
    return missing


def _lock(folder: Path, out: Path) -> int:
    """Return the descriptor of the lock file of ``folder``, locked; refuse when another run holds it.

    A lock file that another run removed after this one opened it is not the
    lock any more: then it is opened anew.
    """
    path = folder.parent / f".{folder.name}.lock"
    while True:
        try:
            fd = os.open(path, os.O_RDWR | os.O_CREAT, 0o666)
        except OSError as exc:
            raise OutputError(f"{out}: cannot create the lock file {path.name}: "
                              f"{exc.strerror or exc}") from None
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            os.close(fd)
            raise OutputError(f"another foretell run is writing {out}; wait for it or choose "
                              "another folder") from None
        except OSError as exc:
            os.close(fd)
            raise OutputError(f"{out}: cannot lock {path.name}: {exc.strerror or exc}") from None
        try:
            current = os.stat(path)
        except FileNotFoundError:
            current = None
        mine = os.fstat(fd)
        if current is not None and (current.st_dev, current.st_ino) == (mine.st_dev, mine.st_ino):
            return fd
        os.close(fd)


def _unlock(folder: Path, fd: int) -> None:
    """Remove the lock file of ``folder`` and release the lock (in that order)."""
    with contextlib.suppress(FileNotFoundError):
        (folder.parent / f".{folder.name}.lock").unlink()
    os.close(fd)


def _tidy(folder: Path) -> bool:
    """Remove the hidden leftovers of runs that died writing ``folder``; return whether one was put back.

    Called under the folder's lock, so no other run is writing it: every
    ``.<name>.<pid>...partial`` is half-written and removed. A
    ``.<name>.<pid>.old`` is the previous folder of a run killed between
    moving it aside and renaming the new one in: put back when the folder is
    missing, else removed.
    """
    restored = False
    prefix = f".{folder.name}."
    for path in sorted(folder.parent.iterdir()):
        parts = path.name[len(prefix):].split(".") if path.name.startswith(prefix) else []
        if len(parts) != {"partial": 3, "old": 2}.get(parts[-1] if parts else "") or not parts[0].isdigit():
            continue  # not ours: e.g. the lock, or the leftovers of a folder named "<name>.5"
        if parts[-1] == "old" and not folder.exists() and not folder.is_symlink():
            os.replace(path, folder)
            restored = True
        else:
            _remove(path)
    return restored


def _remove(path: Path) -> None:
    """Remove a file, a symbolic link (not its target) or a folder tree."""
    if path.is_symlink() or not path.is_dir():
        with contextlib.suppress(FileNotFoundError):
            path.unlink()
    else:
        shutil.rmtree(path, ignore_errors=True)


def _check_replaceable(folder: Path, out: Path) -> None:
    """Raise OutputError unless ``folder`` was written by foretell, holds nothing else and is unchanged.

    A manifest whose ``files`` is a list (written before the digests) cannot
    be checked for changed files: its listed files count as foretell's.
    """
    try:
        record = json.loads((folder / MANIFEST).read_text(encoding="utf-8"))
    except (OSError, ValueError):
        record = None
    if not isinstance(record, dict) or record.get("tool") != TOOL:
        raise OutputError(f"{out}: not a folder foretell wrote (no foretell {MANIFEST}); "
                          "--force replaces only foretell's own result folders: choose a new folder")
    listed = record.get("files", {})
    digests = dict(listed) if isinstance(listed, dict) else dict.fromkeys(listed if isinstance(listed, list)
                                                                           else [])
    present = {p.relative_to(folder).as_posix(): p for p in folder.rglob("*")
               if p.is_file() or p.is_symlink()}
    unknown = sorted(set(present) - set(digests) - {MANIFEST})
    if unknown:
        raise OutputError(f"{out}: holds files foretell did not write ({_show(unknown)}); move them "
                          "away or choose a new folder: --force never deletes unknown files")
    changed = sorted(name for name, digest in digests.items() if digest is not None and name in present
                     and (present[name].is_symlink() or file_sha256(present[name]) != digest))
    if changed:
        them = "it" if len(changed) == 1 else "them"
        raise OutputError(f"{out}: --force refused: {plural(len(changed), 'file')} changed since "
                          f"foretell wrote {them} ({_show(changed)}; the SHA-256 differs from "
                          f"{MANIFEST}); nothing was deleted: move {them} away or choose a new folder")


def _show(names: list[str]) -> str:
    """Return the first few names, comma-separated, and how many more there are."""
    more = len(names) - _SHOW_FILES
    return ", ".join(names[:_SHOW_FILES]) + (f" and {more} more" if more > 0 else "")


# --- writing ---------------------------------------------------------------------------------

def _contents(tables: Mapping[str, pd.DataFrame], texts: Mapping[str, str],
              extra: Mapping[str, bytes]) -> Iterator[tuple[str, bytes]]:
    """Check every file's name and type, then yield (relative name, bytes), encoding tables one at a time."""
    kinds = ((tables, pd.DataFrame, "tables", "a DataFrame"), (texts, str, "texts", "text"),
             (extra, (bytes, bytearray), "extra", "bytes"))
    names = []
    for values, kind, what, expected in kinds:
        if not isinstance(values, Mapping):
            raise UsageError(f"{what} must be a mapping of file names to {expected}, "
                             f"got {type(values).__name__}")
        wrong = [str(k) for k, v in values.items() if not isinstance(v, kind)]
        if wrong:
            raise UsageError(f"{what} must map file names to {expected}; {wrong[0]!r} is not")
        names += [f"{name}.csv" if values is tables else str(name) for name in values]
    for name in names:
        relative = Path(name)
        if not name or relative.is_absolute() or ".." in relative.parts or name == MANIFEST:
            raise UsageError(f"output file name {name!r} must be a relative name inside the folder "
                             f"(not absolute, no '..', not {MANIFEST})")
    return _encoded(tables, texts, extra)


def _encoded(tables: Mapping[str, pd.DataFrame], texts: Mapping[str, str],
             extra: Mapping[str, bytes]) -> Iterator[tuple[str, bytes]]:
    """Yield (relative name, bytes) of every file; a table is encoded only when its turn comes."""
    for name, table in tables.items():
        yield f"{name}.csv", table.to_csv(index=False).encode("utf-8")
    for name, text in texts.items():
        yield name, text.encode("utf-8")
    for name, data in extra.items():
        yield name, bytes(data)


def _write(folder: Path, name: str, data: bytes) -> str:
    """Write ``data`` to folder/name (making subfolders) and return its SHA-256."""
    path = folder / name
    if path.parent != folder:
        path.parent.mkdir(parents=True, exist_ok=True)
    path.write_bytes(data)
    return hashlib.sha256(data).hexdigest()


def _swap_in(tmp: Path, folder: Path) -> None:
    """Rename ``tmp`` to ``folder``; an existing ``folder`` is moved aside first and removed last."""
    if not folder.exists():
        os.replace(tmp, folder)
        return
    old = folder.with_name(f".{folder.name}.{os.getpid()}.old")
    _remove(old)
    os.replace(folder, old)
    try:
        os.replace(tmp, folder)
    except BaseException:
        os.replace(old, folder)
        raise
    _remove(old)


def _umask() -> int:
    mask = os.umask(0)
    os.umask(mask)
    return mask
