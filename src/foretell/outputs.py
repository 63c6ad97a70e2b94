"""Writing result folders: a whole folder appears at once or not at all, and nothing of the user's is lost.

Rules (each backed by a test in tests/test_outputs.py):

- An output folder may not be, contain or sit inside-out of an input: it may not
  be an input file, a folder holding an input, the current folder or one of
  its parents.
- An existing non-empty folder is replaced only with ``force``, and only when
  foretell wrote it: it holds foretell's ``manifest.json`` and no file that the
  manifest does not list. Unknown files are never deleted.
- Results are written into a hidden sibling ``.<name>.<pid>.partial`` that is
  renamed into place when complete; a replaced folder is moved aside to
  ``.<name>.<pid>.old`` until the new one is in place. An interrupted run
  (Ctrl-C, SIGTERM) leaves the previous folder or nothing; partial folders of
  runs that died are removed by the next run.
- Files and folders get the caller's umask (not a private 0700).
"""

from __future__ import annotations

import contextlib
import hashlib
import json
import os
import shutil
import tempfile
from collections.abc import Iterable, Mapping
from pathlib import Path
from typing import TYPE_CHECKING

import pandas as pd

from .errors import OutputError

if TYPE_CHECKING:
    from .results import Result

MANIFEST = "manifest.json"
TOOL = "foretell"
PACKAGES = ("numpy", "scipy", "pandas", "scikit-learn", "statsmodels", "pymc", "arviz", "joblib",
            "matplotlib")


def write(out_dir: str | Path, result: "Result", *, inputs: Iterable[str | Path] = (), force: bool = False,
          manifest: Mapping[str, object] | None = None) -> Path:
    """Return ``out_dir`` after writing any step's result there, atomically, with its manifest.

    Parameters
    ----------
    out_dir : str or pathlib.Path
        The folder to write (see the module docstring for what is refused).
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
    """
    from .plots import figure_png

    extra = dict(result.blobs())
    for name, draw in result.figure_makers().items():
        figure = draw()
        extra[f"figures/{name}.png"] = figure_png(figure)
    record = {**dict(manifest or {}), "step": result.step, "settings": dict(result.settings),
              "notes": list(result.notes)}
    return write_outputs(out_dir, result.tables(), texts=result.texts(), manifest=record, inputs=inputs,
                         force=force, extra=extra)


def write_outputs(out_dir: str | Path, tables: Mapping[str, pd.DataFrame], *,
                  texts: Mapping[str, str] | None = None, manifest: Mapping[str, object] | None = None,
                  inputs: Iterable[str | Path] = (), force: bool = False,
                  extra: Mapping[str, bytes] | None = None) -> Path:
    """Return ``out_dir`` after writing every table as ``<name>.csv``, the texts and ``manifest.json``.

    Table names may contain '/' to write into subfolders. ``extra`` holds other
    files as bytes (figures, netCDF posteriors). ``manifest`` is merged into the
    manifest foretell writes (which lists every file it wrote). See the module
    docstring for what is refused and how the folder is replaced.
    """
    out = check_output_dir(out_dir, inputs=inputs, force=force)
    _remove_stale(out)
    try:
        out.parent.mkdir(parents=True, exist_ok=True)
        tmp = Path(tempfile.mkdtemp(prefix=f".{out.name}.{os.getpid()}.", suffix=".partial",
                                    dir=out.parent))
        os.chmod(tmp, 0o777 & ~_umask())
    except OSError as exc:
        raise OutputError(f"{out}: cannot create the output folder: {exc.strerror or exc}") from None
    try:
        files: list[str] = []
        for name, table in tables.items():
            files.append(_write(tmp, f"{name}.csv", table.to_csv(index=False).encode("utf-8")))
        for name, text in (texts or {}).items():
            files.append(_write(tmp, name, text.encode("utf-8")))
        for name, data in (extra or {}).items():
            files.append(_write(tmp, name, data))
        record = {"tool": TOOL, **dict(manifest or {}), "files": sorted(files)}
        _write(tmp, MANIFEST, (json.dumps(record, indent=2, sort_keys=True, default=str) + "\n")
               .encode("utf-8"))
        _swap_in(tmp, out)
    except OSError as exc:
        shutil.rmtree(tmp, ignore_errors=True)
        raise OutputError(f"{out}: cannot write the output: {exc.strerror or exc}") from None
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    return out


def check_output_dir(out_dir: str | Path, *, inputs: Iterable[str | Path] = (),
                     force: bool = False) -> Path:
    """Return ``out_dir`` as a Path if results may be written there; raise OutputError if not.

    Call it before long work, so that a refusal comes before the work, not after.
    """
    text = str(out_dir)
    if not text.strip():
        raise OutputError("the output folder name is empty: give a new folder, e.g. --out results")
    out = Path(text)
    resolved = out.resolve()
    here = Path.cwd().resolve()
    if resolved == here or resolved in here.parents:
        raise OutputError(f"{out}: is the current folder or one of its parents; results go into "
                          "a folder of their own, e.g. --out results")
    for source in inputs:
        src = Path(source).resolve()
        if src == resolved or resolved in src.parents:
            raise OutputError(f"{out}: holds the input {source}; choose an output folder that "
                              "holds no input")
    if out.exists() and not out.is_dir():
        raise OutputError(f"{out}: exists and is not a folder")
    if out.is_dir() and any(out.iterdir()):
        if not force:
            raise OutputError(f"{out}: folder exists and is not empty; pass --force to replace a "
                              "folder that foretell wrote")
        _check_replaceable(out)
    parent = next((p for p in out.absolute().parents if p.exists()), Path("."))
    if not parent.is_dir():
        raise OutputError(f"{out}: {parent} is not a folder")
    return out


def provenance(command: str, options: Mapping[str, object], inputs: Iterable[str | Path],
               timings: Mapping[str, float] | None = None) -> dict[str, object]:
    """Return the manifest record of a run: foretell's and the main packages' versions,
    the SHA-256 of every input file, the full option set (seed included) and timings."""
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
            "inputs": {str(p): file_sha256(p) for p in inputs},
            "python": platform.python_version(), "packages": packages,
            "timings_s": dict(timings or {})}


def netcdf_bytes(idata: object) -> bytes:
    """Return an ArviZ InferenceData as the bytes of a netCDF file (to write with the other outputs)."""
    with tempfile.TemporaryDirectory() as folder:
        path = Path(folder) / "posterior.nc"
        idata.to_netcdf(str(path))
        return path.read_bytes()


def file_sha256(path: str | Path) -> str:
    """Return the SHA-256 hex digest of a file's bytes."""
    digest = hashlib.sha256()
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            digest.update(chunk)
    return digest.hexdigest()


def _check_replaceable(out: Path) -> None:
    """Raise OutputError unless ``out`` was written by foretell and holds nothing else."""
    try:
        record = json.loads((out / MANIFEST).read_text(encoding="utf-8"))
    except (OSError, ValueError):
        record = None
    if not isinstance(record, dict) or record.get("tool") != TOOL:
        raise OutputError(f"{out}: not a folder foretell wrote (no foretell {MANIFEST}); "
                          "--force replaces only foretell's own result folders: choose a new folder")
    known = set(record.get("files", [])) | {MANIFEST}
    present = {p.relative_to(out).as_posix() for p in out.rglob("*") if p.is_file() or p.is_symlink()}
    unknown = sorted(present - known)
    if unknown:
        shown = ", ".join(unknown[:5]) + (f" and {len(unknown) - 5} more" if len(unknown) > 5 else "")
        raise OutputError(f"{out}: holds files foretell did not write ({shown}); move them "
                          "away or choose a new folder: --force never deletes unknown files")


def _write(folder: Path, name: str, data: bytes) -> str:
    """Write ``data`` to folder/name (making subfolders) and return the name."""
    path = folder / name
    if path.parent != folder:
        path.parent.mkdir(parents=True, exist_ok=True)
    path.write_bytes(data)
    return Path(name).as_posix()


def _swap_in(tmp: Path, out: Path) -> None:
    """Rename ``tmp`` to ``out``; an existing ``out`` is moved aside first and removed last."""
    if not out.exists():
        os.replace(tmp, out)
        return
    old = out.with_name(f".{out.name}.{os.getpid()}.old")
    if old.exists():
        shutil.rmtree(old)
    os.replace(out, old)
    try:
        os.replace(tmp, out)
    except BaseException:
        os.replace(old, out)
        raise
    shutil.rmtree(old, ignore_errors=True)


def _remove_stale(out: Path) -> None:
    """Remove hidden partial/old siblings of ``out`` left by runs whose process is gone."""
    parent = out.parent if str(out.parent) else Path(".")
    if not parent.is_dir():
        return
    for path in parent.glob(f".{out.name}.*"):
        parts = path.name[len(out.name) + 2:].split(".")
        if len(parts) < 2 or parts[-1] not in ("partial", "old") or not parts[0].isdigit():
            continue
        pid = int(parts[0])
        if pid != os.getpid() and _alive(pid):
            continue
        if parts[-1] == "old" and not out.exists():
            with contextlib.suppress(OSError):
                os.replace(path, out)  # a run died between moving the old folder aside and swapping
            continue
        shutil.rmtree(path, ignore_errors=True)


def _alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


def _umask() -> int:
    mask = os.umask(0)
    os.umask(mask)
    return mask
