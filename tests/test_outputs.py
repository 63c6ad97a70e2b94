"""Atomic result directories: all or nothing, never overwritten without force."""

from __future__ import annotations

from pathlib import Path

import pandas as pd
import pytest

from foretell.errors import OutputError
from foretell.outputs import write_tables


def tables() -> dict[str, pd.DataFrame]:
    return {"fits": pd.DataFrame({"participant": ["p01"], "loglik": [-1.5]})}


def test_writes_csv_and_text(tmp_path: Path) -> None:
    out = write_tables(tmp_path / "res", tables(), texts={"summary.txt": "hello\n"})
    assert pd.read_csv(out / "fits.csv").loglik.tolist() == [-1.5]
    assert (out / "summary.txt").read_text() == "hello\n"
    assert [p.name for p in tmp_path.iterdir()] == ["res"]  # no temporary left behind


def test_refuses_non_empty_directory_without_force(tmp_path: Path) -> None:
    out = tmp_path / "res"
    out.mkdir()
    (out / "keep.txt").write_text("mine")
    with pytest.raises(OutputError, match="--force"):
        write_tables(out, tables())
    assert (out / "keep.txt").read_text() == "mine"
    write_tables(out, tables(), force=True)
    assert sorted(p.name for p in out.iterdir()) == ["fits.csv"]


def test_empty_directory_is_used(tmp_path: Path) -> None:
    out = tmp_path / "res"
    out.mkdir()
    write_tables(out, tables())
    assert (out / "fits.csv").exists()


def test_failure_leaves_nothing(tmp_path: Path) -> None:
    class Broken(pd.DataFrame):
        def to_csv(self, *args, **kwargs):  # type: ignore[override]
            raise RuntimeError("disk full")

    with pytest.raises(RuntimeError):
        write_tables(tmp_path / "res", {"a": tables()["fits"], "b": Broken({"x": [1]})})
    assert list(tmp_path.iterdir()) == []


def test_refuses_a_file(tmp_path: Path) -> None:
    target = tmp_path / "res"
    target.write_text("a file")
    with pytest.raises(OutputError, match="not a directory"):
        write_tables(target, tables(), force=True)
