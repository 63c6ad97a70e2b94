"""Writing result tables: a whole directory appears at once, or not at all."""

from __future__ import annotations

import os
import shutil
import tempfile
from pathlib import Path
from typing import Mapping

import pandas as pd

from .errors import OutputError


def write_tables(out_dir: str | Path, tables: Mapping[str, pd.DataFrame], *,
                 texts: Mapping[str, str] | None = None, force: bool = False) -> Path:
    """Return ``out_dir`` after writing each table as ``<name>.csv`` (and each text file) into it.

    The files are written into a temporary sibling directory that is renamed
    into place only when everything has been written, so a failure leaves no
    half-written output. An existing non-empty ``out_dir`` is refused unless
    ``force``; with ``force`` it is replaced only after the new one is complete.
    """
    out = check_output_dir(out_dir, force=force)
    try:
        out.parent.mkdir(parents=True, exist_ok=True)
        tmp = Path(tempfile.mkdtemp(prefix=f".{out.name}.", suffix=".partial", dir=out.parent))
    except OSError as exc:
        raise OutputError(f"{out}: cannot create the output directory: {exc.strerror or exc}") from None
    try:
        for name, table in tables.items():
            table.to_csv(tmp / f"{name}.csv", index=False)
        for name, text in (texts or {}).items():
            (tmp / name).write_text(text, encoding="utf-8")
        if out.exists():
            old = out.with_name(f".{out.name}.old")
            if old.exists():
                shutil.rmtree(old)
            os.replace(out, old)
            os.replace(tmp, out)
            shutil.rmtree(old)
        else:
            os.replace(tmp, out)
    except OSError as exc:
        shutil.rmtree(tmp, ignore_errors=True)
        raise OutputError(f"{out}: cannot write the output: {exc.strerror or exc}") from None
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    return out


def check_output_dir(out_dir: str | Path, *, force: bool = False) -> Path:
    """Return ``out_dir`` as a Path if results may be written there; raise OutputError if not.

    Call it before long work, so that a refusal comes before the work, not after.
    """
    out = Path(out_dir)
    if out.exists() and not out.is_dir():
        raise OutputError(f"{out}: exists and is not a directory")
    if out.is_dir() and any(out.iterdir()) and not force:
        raise OutputError(f"{out}: directory exists and is not empty; pass --force to replace it")
    parent = next((p for p in out.parents if p.exists()), Path("."))
    if not parent.is_dir():
        raise OutputError(f"{out}: {parent} is not a directory")
    return out
