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
    assert sorted(record["files"]) == ["fits.csv", "summary.txt"]
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


# --- issue 20: concurrent runs, stale renames, verified --force, symlinked folders -----------

_HOLDER = """
import sys
import pandas as pd
from foretell.outputs import reserve, write_outputs
out = sys.argv[1]
with reserve(out):
    print("held", flush=True)
    sys.stdin.readline()
    write_outputs(out, {"fits": pd.DataFrame({"run": ["first"]})})
print("done", flush=True)
"""

_RUNNER = """
import sys
import pandas as pd
from foretell.errors import OutputError
from foretell.outputs import reserve, write_outputs
out = sys.argv[1]
try:
    with reserve(out):
        write_outputs(out, {"fits": pd.DataFrame({"run": ["second"]})})
except OutputError as err:
    print(f"refused: {err}", flush=True)
    sys.exit(1)
print("done", flush=True)
"""


def _python(script: str, *args: str, **kwargs):
    import subprocess
    import sys

    return subprocess.Popen([sys.executable, "-c", script, *args], text=True, stdin=subprocess.PIPE,
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, **kwargs)


def test_a_second_run_into_the_same_folder_is_refused_while_the_first_writes(tmp_path: Path) -> None:
    out = tmp_path / "res"
    first = _python(_HOLDER, str(out))
    assert first.stdout.readline().strip() == "held"
    second = _python(_RUNNER, str(out))
    said, _ = second.communicate(timeout=60)
    assert second.returncode == 1
    assert said.strip() == (f"refused: another foretell run is writing {out}; "
                            "wait for it or choose another folder")
    said, err = first.communicate("\n", timeout=60)
    assert first.returncode == 0 and said.strip() == "done", err
    assert pd.read_csv(out / "fits.csv")["run"].tolist() == ["first"]
    assert json.loads((out / MANIFEST).read_text())["files"].keys() == {"fits.csv"}
    assert sorted(p.name for p in tmp_path.iterdir()) == ["res"]  # no lock file left behind


def test_two_runs_started_together_one_succeeds_and_the_folder_is_whole(tmp_path: Path) -> None:
    out = tmp_path / "res"
    script = _RUNNER.replace("write_outputs(out,", "__import__('time').sleep(1.0); write_outputs(out,")
    runs = [_python(script, str(out)) for _ in range(2)]
    codes = [run.wait(timeout=60) for run in runs]
    assert sorted(codes) == [0, 1]
    assert pd.read_csv(out / "fits.csv")["run"].tolist() == ["second"]
    assert sorted(p.name for p in out.iterdir()) == ["fits.csv", MANIFEST]
    assert sorted(p.name for p in tmp_path.iterdir()) == ["res"]


def test_writing_inside_a_reservation_of_this_process(tmp_path: Path) -> None:
    from foretell.outputs import reserve

    with reserve(tmp_path / "res") as out:
        write_outputs(out, tables())
        with pytest.raises(OutputError, match="--force"):
            write_outputs(out, tables())
    assert sorted(p.name for p in tmp_path.iterdir()) == ["res"]


def test_reserve_refuses_before_any_work_and_leaves_nothing(tmp_path: Path) -> None:
    from foretell.outputs import reserve

    out = write_outputs(tmp_path / "res", tables())
    with pytest.raises(OutputError, match="--force"):
        with reserve(out):
            raise AssertionError("the body must not run")
    with pytest.raises(OutputError, match="holds the input"):
        with reserve(tmp_path / "new" / "deeper", inputs=[tmp_path / "new" / "deeper" / "log.csv"]):
            raise AssertionError("the body must not run")
    assert sorted(p.name for p in tmp_path.iterdir()) == ["res"]


def _died_between_renames(tmp_path: Path) -> Path:
    """Leave what a run killed between its two renames leaves: the old folder aside, the new one partial."""
    out = write_outputs(tmp_path / "res", {"fits": pd.DataFrame({"run": ["old"]})})
    os.replace(out, tmp_path / ".res.999999999.old")  # no such process
    partial = tmp_path / ".res.999999999.abc.partial"
    partial.mkdir()
    (partial / "fits.csv").write_text("run\nnew\n")
    return out


def test_a_run_that_died_between_its_renames_is_recovered_not_replaced(tmp_path: Path) -> None:
    out = _died_between_renames(tmp_path)
    with pytest.raises(OutputError, match="restored .* interrupted"):
        write_outputs(out, {"fits": pd.DataFrame({"run": ["next"]})})
    assert pd.read_csv(out / "fits.csv")["run"].tolist() == ["old"]
    assert sorted(p.name for p in tmp_path.iterdir()) == ["res"]
    write_outputs(out, {"fits": pd.DataFrame({"run": ["next"]})}, force=True)
    assert pd.read_csv(out / "fits.csv")["run"].tolist() == ["next"]
    assert sorted(p.name for p in tmp_path.iterdir()) == ["res"]


def test_a_stale_old_beside_a_complete_folder_is_removed(tmp_path: Path) -> None:
    out = write_outputs(tmp_path / "res", tables())
    (tmp_path / ".res.999999999.old").mkdir()
    write_outputs(out, tables(), force=True)
    assert sorted(p.name for p in tmp_path.iterdir()) == ["res"]


def test_leftovers_of_a_folder_with_a_longer_name_are_not_touched(tmp_path: Path) -> None:
    others = [tmp_path / ".res.5.123.abc.partial", tmp_path / ".res.5.123.old"]  # of a folder "res.5"
    for path in others:
        path.mkdir()
    write_outputs(tmp_path / "res", tables())
    assert all(path.is_dir() for path in others)


def test_manifest_records_the_sha256_of_every_file(tmp_path: Path) -> None:
    out = write_outputs(tmp_path / "res", tables(), texts={"summary.txt": "hi\n"})
    files = json.loads((out / MANIFEST).read_text())["files"]
    assert files == {name: file_sha256(out / name) for name in ("fits.csv", "summary.txt")}


def test_force_refuses_to_delete_files_changed_since_foretell_wrote_them(tmp_path: Path) -> None:
    out = write_outputs(tmp_path / "res", tables(), texts={"summary.txt": "hi\n", "notes.txt": "x\n"})
    (out / "summary.txt").write_text("my edits\n")
    (out / "notes.txt").write_text("mine too\n")
    with pytest.raises(OutputError) as err:
        write_outputs(out, tables(), force=True)
    message = str(err.value)
    assert "\n" not in message and "notes.txt, summary.txt" in message and "nothing was deleted" in message
    assert (out / "summary.txt").read_text() == "my edits\n" and (out / "notes.txt").read_text() == "mine too\n"
    assert (out / "fits.csv").exists()


def test_force_still_replaces_a_folder_of_an_older_manifest(tmp_path: Path) -> None:
    out = write_outputs(tmp_path / "res", tables())
    record = json.loads((out / MANIFEST).read_text())
    record["files"] = sorted(record["files"])  # the list form written before the checksums
    (out / MANIFEST).write_text(json.dumps(record))
    write_outputs(out, {"other": tables()["fits"]}, force=True)
    assert sorted(p.name for p in out.iterdir()) == [MANIFEST, "other.csv"]


@pytest.mark.parametrize("target_state", ["missing", "empty", "ours"])
def test_a_symlinked_output_folder_is_written_through_and_kept(tmp_path: Path, target_state: str) -> None:
    real = tmp_path / "real"
    if target_state == "empty":
        real.mkdir()
    elif target_state == "ours":
        write_outputs(real, {"old": tables()["fits"]})
    link = tmp_path / "link"
    link.symlink_to(real, target_is_directory=True)
    write_outputs(link, tables(), force=target_state == "ours")
    assert link.is_symlink() and link.resolve() == real.resolve()
    assert sorted(p.name for p in real.iterdir()) == ["fits.csv", MANIFEST]
    assert sorted(p.name for p in tmp_path.iterdir()) == ["link", "real"]


def test_a_symlink_to_a_file_is_refused(tmp_path: Path) -> None:
    target = tmp_path / "file.txt"
    target.write_text("mine")
    link = tmp_path / "link"
    link.symlink_to(target)
    with pytest.raises(OutputError, match="not a folder"):
        write_outputs(link, tables(), force=True)
    assert target.read_text() == "mine" and link.is_symlink()
