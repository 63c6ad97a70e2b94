"""Tests of BIDS in (beh and events files of a dataset) and out (a derivatives dataset of any step's result)."""

from __future__ import annotations

import json
import re
import shutil
import subprocess
from dataclasses import dataclass
from pathlib import Path
from typing import ClassVar

import pandas as pd
import pytest

import foretell
from foretell.bids import PIPELINE, entities, write_bids_derivatives
from foretell.errors import LogError, OutputError
from foretell.logs import load_log, validate_log
from foretell.results import Result
from foretell.simulate import simulate_participants
from foretell.steps.events import export_events

EXAMPLES = Path(__file__).resolve().parents[1] / "examples" / "profiles"


@dataclass(frozen=True, eq=False, kw_only=True)
class TablesResult(Result):
    """A step's result made of given tables (what write_bids_derivatives reads of any result)."""

    step: ClassVar[str] = "fit"
    given: dict

    def tables(self) -> dict[str, pd.DataFrame]:
        return dict(self.given)


@pytest.fixture(scope="module")
def study(lantern) -> pd.DataFrame:
    """Two sessions of three participants in two groups, with guess onsets (no reveal onsets)."""
    sessions = [simulate_participants(lantern, 3, 2, groups={"rested": ["count-1"], "tired": ["count-0"]},
                                      seed=s, block_length=12)[0].assign(session=s) for s in (1, 2)]
    return pd.concat(sessions, ignore_index=True).drop(columns="reveal_onset")


# --- in -----------------------------------------------------------------------------------------

def test_a_bids_dataset_of_beh_files_gives_the_canonical_log(lantern):
    expected = load_log(EXAMPLES / "canonical.csv", lantern)
    log = load_log(EXAMPLES / "bids-beh", lantern, profile=EXAMPLES / "bids-beh.toml")
    pd.testing.assert_frame_equal(log.frame, expected.frame)
    assert len(log.sources) == 6 and all(s.endswith("_beh.tsv") for s in log.sources)
    assert any("group from participants.tsv column 'group'" in m for m in log.mapped)


def test_events_written_by_the_events_step_read_back_as_a_bids_dataset(tmp_path, lantern, study):
    log = validate_log(study, lantern)
    events = export_events(log, lantern, models=["count-1"])
    root = tmp_path / "study"
    root.mkdir()
    (root / "dataset_description.json").write_text('{"Name": "invented", "BIDSVersion": "1.10.0"}')
    people = study[["participant", "group"]].drop_duplicates()
    pd.DataFrame({"participant_id": "sub-" + people["participant"], "group": people["group"]}).to_csv(
        root / "participants.tsv", sep="\t", index=False)
    for name, data in events.blobs().items():
        sub, ses = name.split("_")[:2]
        folder = root / sub / ses / "eeg"
        folder.mkdir(parents=True, exist_ok=True)
        (folder / name).write_bytes(data)
    back = load_log(root, lantern, profile=EXAMPLES / "bids-events.toml")
    pd.testing.assert_frame_equal(back.frame, log.frame)
    assert len(back.sources) == 6
    assert invalid_bids_paths(root) == []


def invalid_bids_paths(root: Path) -> list[str]:
    """Return the files of a dataset whose paths the BIDS validator refuses (bids-validator, BIDSValidator.is_bids)."""
    validator = pytest.importorskip("bids_validator").BIDSValidator()
    paths = ["/" + p.relative_to(root).as_posix() for p in root.rglob("*") if p.is_file()]
    return [p for p in paths if not validator.is_bids(p)]


def test_the_example_dataset_is_valid_bids():
    assert invalid_bids_paths(EXAMPLES / "bids-beh") == []


def test_a_bids_root_without_its_description_is_one_line(tmp_path, lantern):
    root = tmp_path / "study"
    shutil.copytree(EXAMPLES / "bids-beh", root)
    (root / "dataset_description.json").unlink()
    with pytest.raises(LogError) as err:
        load_log(root, lantern, profile=EXAMPLES / "bids-beh.toml")
    (problem,) = err.value.problems
    assert problem.path == str(root) and "no dataset_description.json" in problem.message


def test_several_tasks_need_a_choice(tmp_path, lantern):
    root = tmp_path / "study"
    shutil.copytree(EXAMPLES / "bids-beh", root)
    other = root / "sub-p01" / "ses-1" / "beh" / "sub-p01_ses-1_task-rest_beh.tsv"
    other.write_text("block\ttrial\n1\t1\n")
    with pytest.raises(LogError, match=r"holds the tasks lanterns, rest: choose one in the profile"):
        load_log(root, lantern)
    log = load_log(root, lantern, profile=EXAMPLES / "bids-beh.toml")  # [bids] task = "lanterns"
    assert str(other) not in log.sources


def test_a_participant_missing_from_participants_tsv(tmp_path, lantern):
    root = tmp_path / "study"
    shutil.copytree(EXAMPLES / "bids-beh", root)
    table = pd.read_csv(root / "participants.tsv", sep="\t")
    table[table["participant_id"] != "sub-p02"].to_csv(root / "participants.tsv", sep="\t", index=False)
    with pytest.raises(LogError, match="participant sub-p02 has files but no row here") as err:
        load_log(root, lantern, profile=EXAMPLES / "bids-beh.toml")
    assert err.value.problems[0].path == str(root / "participants.tsv")


@pytest.mark.parametrize("name", ["sub-01_ses-2_task-lanterns_run-3_desc-x_beh.tsv",
                                  "sub-p07_task-lanterns_acq-fast_events.tsv"])
def test_entities_agree_with_mne_bids(name):
    # Reference: mne-bids (Appelhoff et al., 2019, JOSS 4(44), 1896), get_entities_from_fname.
    mne_bids = pytest.importorskip("mne_bids")
    long = {"sub": "subject", "ses": "session", "task": "task", "run": "run", "desc": "description",
            "acq": "acquisition"}
    mine = {long[k]: v for k, v in entities(name).items() if k != "suffix"}
    theirs = {k: v for k, v in mne_bids.get_entities_from_fname(name).items() if v is not None}
    assert mine == theirs and entities(name)["suffix"] == name.split("_")[-1].split(".")[0]


# --- out ----------------------------------------------------------------------------------------

@pytest.fixture
def result(lantern) -> TablesResult:
    fits = pd.DataFrame({"participant": ["p01", "p01", "p 02", "p 02"], "group": ["a", "a", "b", "b"],
                         "model": ["count-0", "count-1"] * 2, "bic": [10.5, 9.25, float("nan"), 7.0]})
    winners = pd.DataFrame({"participant": ["p01", "p 02", "all"], "block": ["all"] * 3,
                            "model": ["count-1", "count-1", "count-1"]})
    selection = pd.DataFrame({"group": ["a", "b"], "model": ["count-1", "count-1"], "pxp": [0.7, 0.6]})
    return TablesResult(task=lantern, settings={"seed": 0}, notes=("an invented note",),
                        given={"fits": fits, "winners_block": winners, "selection": selection})


def test_derivatives_layout_and_description(tmp_path, result):
    out = write_bids_derivatives(tmp_path, result, command="foretell fit data/ --task lantern-relay")
    assert out == tmp_path / "derivatives" / PIPELINE
    files = sorted(p.relative_to(out).as_posix() for p in out.rglob("*") if p.is_file())
    assert files == [".bidsignore", "README.md", "dataset_description.json", "manifest.json",
                     "participants.json", "participants.tsv",
                     "sub-p01/beh/sub-p01_task-lanternrelay_desc-fits_beh.tsv",
                     "sub-p01/beh/sub-p01_task-lanternrelay_desc-winnersBlock_beh.tsv",
                     "sub-p02/beh/sub-p02_task-lanternrelay_desc-fits_beh.tsv",
                     "sub-p02/beh/sub-p02_task-lanternrelay_desc-winnersBlock_beh.tsv",
                     "task-lanternrelay_desc-selection_beh.tsv", "task-lanternrelay_desc-winnersBlock_beh.tsv"]
    # BIDS specification, "Derivatives: dataset_description.json": Name, BIDSVersion, DatasetType
    # "derivative" and GeneratedBy (an array of objects with a Name) are required of a derivatives dataset.
    description = json.loads((out / "dataset_description.json").read_text())
    assert description["DatasetType"] == "derivative" and description["Name"] and description["BIDSVersion"]
    (generated,) = description["GeneratedBy"]
    assert generated["Name"] == "foretell" and generated["Version"] == foretell.__version__
    assert "command: foretell fit data/ --task lantern-relay" in generated["Description"]
    fits = pd.read_csv(out / "sub-p02/beh/sub-p02_task-lanternrelay_desc-fits_beh.tsv", sep="\t",
                       keep_default_na=False)
    assert fits["participant"].tolist() == ["p 02", "p 02"] and fits["bic"].tolist() == ["n/a", "7.0"]
    people = pd.read_csv(out / "participants.tsv", sep="\t")
    assert people.to_dict("list") == {"participant_id": ["sub-p02", "sub-p01"], "participant": ["p 02", "p01"],
                                      "group": ["b", "a"]}
    top = pd.read_csv(out / "task-lanternrelay_desc-winnersBlock_beh.tsv", sep="\t")
    assert top["participant"].tolist() == ["all"]
    assert (out / ".bidsignore").read_text() == "manifest.json\n"


def test_derivative_file_names_follow_the_bids_schema(tmp_path, result):
    # The BIDS specification's machine-readable schema (bidsschematools, shipped with the BIDS
    # validator): rule files.deriv.preprocessed_data.beh_noncontinuous_common, entity order rules.entities.
    schema = pytest.importorskip("bidsschematools.schema").load_schema()
    rule = schema.rules.files.deriv.preprocessed_data.beh_noncontinuous_common
    order = [e for e in schema.rules.entities if e in rule.entities]
    name = "".join(f"(?:{schema.objects.entities[e].name}-[0-9A-Za-z]+_)" + ("" if rule.entities[e] == "required"
                                                                             else "?") for e in order)
    pattern = re.compile(name + f"(?:{'|'.join(rule.suffixes)})(?:{'|'.join(map(re.escape, rule.extensions))})")
    out = write_bids_derivatives(tmp_path, result)
    tables = [p for p in out.rglob("*_beh.tsv")]
    assert len(tables) == 6
    for path in tables:
        assert pattern.fullmatch(path.name), path.name
        if path.parent != out:
            assert path.parent.name in rule.datatypes and path.parents[1].name == path.name.split("_")[0]


@pytest.mark.skipif(shutil.which("bids-validator-deno") is None, reason="the BIDS validator is not installed")
def test_the_bids_validator_finds_no_error(tmp_path, result):
    out = write_bids_derivatives(tmp_path, result)
    report = subprocess.run(["bids-validator-deno", "--json", str(out)], capture_output=True, text=True,
                            timeout=300)
    issues = json.loads(report.stdout)["issues"]["issues"]
    assert [i for i in issues if i["severity"] == "error"] == []


def test_derivatives_are_atomic_and_kept_without_force(tmp_path, result, lantern):
    out = write_bids_derivatives(tmp_path, result)
    before = (out / "participants.tsv").read_bytes()
    with pytest.raises(OutputError, match="pass --force"):
        write_bids_derivatives(tmp_path, TablesResult(task=lantern, given={"fits": result.given["fits"].head(2)}))
    assert (out / "participants.tsv").read_bytes() == before
    write_bids_derivatives(tmp_path, TablesResult(task=lantern, given={"fits": result.given["fits"].head(2)}),
                           force=True)
    assert not (out / "sub-p02").exists() and not list((tmp_path / "derivatives").glob(".*"))


def test_events_derivatives_read_back(tmp_path, lantern, study):
    log = validate_log(study.drop(columns="group"), lantern)
    out = write_bids_derivatives(tmp_path, export_events(log, lantern, models=["count-1"]))
    assert (out / "sub-p01" / "ses-2" / "beh" / "sub-p01_ses-2_task-lanternrelay_events.tsv").is_file()
    back = load_log(out, lantern, profile=EXAMPLES / "bids-events.toml")
    pd.testing.assert_frame_equal(back.frame, log.frame)
