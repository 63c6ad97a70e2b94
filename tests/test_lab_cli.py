"""Tests of the lab commands as the command line wires them: foretell profile and foretell sequence."""

from __future__ import annotations

import argparse
from pathlib import Path

import pytest

from foretell.cli.lab import cmd_profile, cmd_sequence, command_line, profile_parser, sequence_parser
from foretell.errors import OutputError

EXAMPLES = Path(__file__).resolve().parents[1] / "examples" / "profiles"


def lab(argv: list[str]) -> int:
    """Run a lab command as cli/parser.py and cli/commands.py wire it."""
    parser = argparse.ArgumentParser(prog="foretell")
    sub = parser.add_subparsers(dest="command")
    for add in (profile_parser, sequence_parser):
        add(lambda name, help_, *examples, more="": sub.add_parser(name))
    args = parser.parse_args(argv)
    return {"profile": cmd_profile, "sequence": cmd_sequence}[args.command](args)


def test_the_profile_command_prints_or_writes_and_keeps_existing_files(tmp_path, capsys):
    source = str(EXAMPLES / "builder-csv" / "p01_lanterns_2024-03-01_10h15.csv")
    assert lab(["profile", "--from", source, "--task", "lantern-relay"]) == 0
    printed = capsys.readouterr().out
    out = tmp_path / "lab.toml"
    assert lab(["profile", "--from", source, "--task", "lantern-relay", "--out", str(out)]) == 0
    assert out.read_text() == printed
    out.write_text("# mine\n")
    with pytest.raises(OutputError, match="exists; pass --force"):
        lab(["profile", "--from", source, "--out", str(out)])
    assert out.read_text() == "# mine\n"
    assert lab(["profile", "--from", source, "--task", "lantern-relay", "--out", str(out), "--force"]) == 0
    assert out.read_text() == printed and not list(tmp_path.glob(".*partial"))


def test_the_sequence_command(tmp_path, capsys):
    out = tmp_path / "stimuli"
    argv = ["sequence", "--task", "lantern-relay", "--participants", "2", "--blocks", "2",
            "--trials-per-block", "30", "--min-context-count", "1", "--seed", "7", "--out", str(out)]
    assert lab(argv) == 0
    first = (out / "sequences" / "p02.csv").read_bytes()
    assert first.startswith(b"participant,block,trial,stimulus\np02,1,1,")
    assert "2 sequence files in" in capsys.readouterr().err
    with pytest.raises(OutputError, match="folder exists and is not empty"):
        lab(argv)
    assert lab([*argv, "--force"]) == 0 and (out / "sequences" / "p02.csv").read_bytes() == first


def test_the_command_line_is_written_back_as_typed():
    args = argparse.Namespace(command="fit", log="data dir/", task="lantern-relay", map=["rt=RT", "trial=n"],
                              force=True, seed=0, models=None, fix_labels=None)
    assert command_line(args) == ("foretell fit 'data dir/' --force --map rt=RT --map trial=n --seed 0 "
                                  "--task lantern-relay")
