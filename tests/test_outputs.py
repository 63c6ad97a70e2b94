"""Result folders: all or nothing, never overwritten without force, never deleting what is not ours."""

from __future__ import annotations

import json
import os
import stat
from pathlib import Path

import pandas as pd
import pytest

from foretell.errors import OutputError
from foretell.outputs import MANIFEST, check_output_dir, file_sha256, write_outputs


def tables() -> dict[str, pd.DataFrame]:
    return {"fits": pd.DataFrame({"participant": ["p01"], "loglik": [-1.5]})}


def test_writes_csv_text_and_manifest(tmp_path: Path) -> None:
    out = write_outputs(tmp_path / "res", tables(), texts={"summary.txt": "hello\n"},
                        manifest={"seed": 3})
    assert pd.read_csv(out / "fits.csv").loglik.tolist() == [-1.5]
    assert (out / "summary.txt").read_text() == "hello\n"
    record = json.loads((out / MANIFEST).read_text())
    assert record["tool"] == "foretell" and record["seed"] == 3
    assert record["files"] == ["fits.csv", "summary.txt"]
    assert [p.name for p in tmp_path.iterdir()] == ["res"]  # no temporary left behind


def test_subfolders_and_bytes(tmp_path: Path) -> None:
    out = write_outputs(tmp_path / "res", {"fit/fits": tables()["fits"]}, extra={"fig/a.png": b"\x89PNG"})
    assert (out / "fit" / "fits.csv").exists() and (out / "fig" / "a.png").read_bytes() == b"\x89PNG"


def test_refuses_non_empty_folder_without_force(tmp_path: Path) -> None:
    out = write_outputs(tmp_path / "res", tables())
    with pytest.raises(OutputError, match="--force"):
        write_outputs(out, tables())
    write_outputs(out, {"other": tables()["fits"]}, force=True)
    assert sorted(p.name for p in out.iterdir()) == [MANIFEST, "other.csv"]


def test_force_never_deletes_a_folder_foretell_did_not_write(tmp_path: Path) -> None:
    # The tester's case: an input and a file of the user's in the output folder, with --force.
    out = tmp_path / "full"
    out.mkdir()
    (out / "keep.txt").write_text("mine")
    with pytest.raises(OutputError, match="not a folder foretell wrote"):
        write_outputs(out, tables(), force=True)
    assert (out / "keep.txt").read_text() == "mine"


def test_force_refuses_when_unknown_files_were_added(tmp_path: Path) -> None:
    out = write_outputs(tmp_path / "res", tables())
    (out / "notes.txt").write_text("my notes")
    with pytest.raises(OutputError, match="notes.txt"):
        write_outputs(out, tables(), force=True)
    assert (out / "notes.txt").read_text() == "my notes"


@pytest.mark.parametrize("where", ["same", "inside"])
def test_refuses_a_folder_that_is_or_holds_an_input(tmp_path: Path, where: str) -> None:
    (tmp_path / "full").mkdir()
    log = tmp_path / "full" / "study.csv"
    log.write_text("x\n")
    target = log if where == "same" else tmp_path / "full"
    with pytest.raises(OutputError, match="input|not a folder"):
        write_outputs(target, tables(), inputs=[log], force=True)
    with pytest.raises(OutputError, match="holds the input"):
        check_output_dir(tmp_path, inputs=[log], force=True)  # a parent of an input
    assert log.read_text() == "x\n"


@pytest.mark.parametrize("name", ["", ".", ".."])
def test_refuses_empty_current_and_parent_folder(tmp_path: Path, monkeypatch, name: str) -> None:
    work = tmp_path / "work"
    work.mkdir()
    monkeypatch.chdir(work)
    with pytest.raises(OutputError):
        check_output_dir(name, force=True)


def test_empty_folder_is_used(tmp_path: Path) -> None:
    out = tmp_path / "res"
    out.mkdir()
    write_outputs(out, tables())
    assert (out / "fits.csv").exists()


def test_failure_leaves_the_previous_folder_or_nothing(tmp_path: Path) -> None:
    class Broken(pd.DataFrame):
        def to_csv(self, *args, **kwargs):  # type: ignore[override]
            raise RuntimeError("disk full")

    with pytest.raises(RuntimeError):
        write_outputs(tmp_path / "res", {"a": tables()["fits"], "b": Broken({"x": [1]})})
    assert list(tmp_path.iterdir()) == []
    out = write_outputs(tmp_path / "res", tables())
    before = (out / "fits.csv").read_bytes()
    with pytest.raises(KeyboardInterrupt):
        class Interrupted(pd.DataFrame):
            def to_csv(self, *args, **kwargs):  # type: ignore[override]
                raise KeyboardInterrupt
        write_outputs(out, {"a": Interrupted({"x": [1]})}, force=True)
    assert (out / "fits.csv").read_bytes() == before
    assert [p.name for p in tmp_path.iterdir()] == ["res"]


def test_stale_partial_of_a_dead_run_is_removed(tmp_path: Path) -> None:
    stale = tmp_path / ".res.999999999.abc.partial"  # no such process
    stale.mkdir()
    (stale / "fits.csv").write_text("half")
    write_outputs(tmp_path / "res", tables())
    assert sorted(p.name for p in tmp_path.iterdir()) == ["res"]


def test_refuses_a_file(tmp_path: Path) -> None:
    target = tmp_path / "res"
    target.write_text("a file")
    with pytest.raises(OutputError, match="not a folder"):
        write_outputs(target, tables(), force=True)


def test_folders_follow_the_callers_umask(tmp_path: Path) -> None:
    old = os.umask(0o022)
    try:
        out = write_outputs(tmp_path / "res", tables())
    finally:
        os.umask(old)
    assert stat.S_IMODE(out.stat().st_mode) == 0o755


def test_sha256_of_a_known_string(tmp_path: Path) -> None:
    # SHA-256("abc") from FIPS 180-2, appendix B.1 (NIST, 2002)
    path = tmp_path / "abc.txt"
    path.write_bytes(b"abc")
    assert file_sha256(path) == "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"
