"""Write the example files beside this script: one invented log in each layout a shipped profile reads.

    python examples/profiles/make_examples.py [--force]

An invented study (three participants guessing which lantern of the
fictional relay tower lights next, two sessions of two blocks) is simulated
once and written as canonical.csv and in four layouts: builder-csv/,
browser-json/, spreadsheet/ (needs openpyxl) and bids-beh/. Each layout read
through its profile gives the log of canonical.csv (tests/test_profiles.py
and tests/test_bids.py check it). The fifth profile, bids-events.toml, reads
the events files that ``foretell events`` writes, placed in a BIDS dataset
beside the EEG (tests/test_bids.py). Existing files are refused unless --force.
"""

from __future__ import annotations

import argparse
import json
import shutil
import sys
from pathlib import Path

import pandas as pd

from foretell.simulate import simulate_participants
from foretell.steps.bids import to_tsv
from foretell.tasks import load_task

HERE = Path(__file__).resolve().parent
LAYOUTS = ("builder-csv", "browser-json", "spreadsheet", "bids-beh")
KEYS = {"red": "f", "green": "g", "blue": "h"}
ARROWS = {"red": "left", "green": "down", "blue": "right"}


def canonical() -> pd.DataFrame:
    """Return the invented study: 3 participants in two groups, 2 sessions of 2 blocks of 15 trials."""
    task = load_task("lantern-relay")
    sessions = []
    for session in (1, 2):
        log, _ = simulate_participants(task, 3, 2, groups={"rested": ["count-2"], "tired": ["count-0"]},
                                       seed=session, block_length=15)
        sessions.append(log.assign(session=session))
    log = pd.concat(sessions, ignore_index=True)
    log.loc[[4, 70], ["response", "rt"]] = ["", float("nan")]  # two missed guesses
    return log[["participant", "group", "session", "block", "trial", "stimulus", "response", "rt"]]


def builder_csv(log: pd.DataFrame, out: Path) -> None:
    """One CSV per participant and session: an instruction row, the trial rows, a goodbye row."""
    for (pid, session), rows in log.groupby(["participant", "session"]):
        head = {"instr_key.keys": "space", "instr_key.rt": 3.214}
        trials = pd.DataFrame({
            "trials.thisRepN": rows["block"] - 1, "trials.thisTrialN": rows.groupby("block").cumcount(),
            "trials.thisN": rows["trial"] - 1, "trials.thisIndex": rows["stimulus"].map({"red": 0, "green": 1, "blue": 2}),
            "lantern": rows["stimulus"], "key_resp.keys": rows["response"].map(KEYS).fillna("None"),
            "key_resp.rt": rows["rt"]})
        table = pd.concat([pd.DataFrame([head]), trials.astype({c: "Int64" for c in trials.columns[:4]}),
                           pd.DataFrame([{"instr_key.keys": "space"}])], ignore_index=True)
        table = table.assign(participant=pid, session=f"{session:03d}", group=rows["group"].iloc[0],
                             date=f"2024-03-0{session}_10h15")
        table.to_csv(out / f"{pid}_lanterns_2024-03-0{session}_10h15.csv", index=False)


def browser_json(log: pd.DataFrame, out: Path) -> None:
    """One JSON array per participant and session: instructions, the trials (RT in ms), a debrief."""
    for (pid, session), rows in log.groupby(["participant", "session"]):
        objects = [{"trial_type": "instructions", "trial_index": 0, "time_elapsed": 4210, "rt": 4198,
                    "response": " ", "stimulus": "<p>Which lantern lights next? Press F, G or H.</p>"}]
        for row in rows.itertuples(index=False):
            missed = row.response == ""
            objects.append({"trial_type": "lantern-guess", "trial_index": int(row.trial),
                            "time_elapsed": 4210 + int(row.trial) * 1400,
                            "rt": None if missed else int(round(row.rt * 1000)),
                            "response": None if missed else KEYS[row.response],
                            "stimulus": f"img/{row.stimulus}.png", "block": int(row.block),
                            "condition": row.group})
        objects.append({"trial_type": "debrief", "trial_index": len(objects), "time_elapsed": 99000,
                        "rt": 2210, "response": {"comments": "fun"}, "stimulus": "<p>Thank you!</p>"})
        (out / f"lanterns_{pid}_session{session}.json").write_text(json.dumps(objects, indent=1) + "\n")


def spreadsheet(log: pd.DataFrame, out: Path) -> None:
    """One workbook per participant and session: practice rows, then the trials; -1 for no response."""
    for (pid, session), rows in log.groupby(["participant", "session"]):
        practice = pd.DataFrame({"Phase": "practice", "Block": 0, "Trial": [1, 2, 3], "Lantern": ["R", "G", "B"],
                                 "Key": ["left", -1, "right"], "RT (ms)": [812, -1, 655]})
        missed = rows["response"] == ""
        trials = pd.DataFrame({"Phase": "test", "Block": rows["block"], "Trial": rows["trial"],
                               "Lantern": rows["stimulus"].str[0].str.upper(),
                               "Key": rows["response"].map(ARROWS).where(~missed, -1),
                               "RT (ms)": (rows["rt"] * 1000).round().where(~missed, -1).astype(int)})
        table = pd.concat([practice, trials], ignore_index=True).assign(Group=rows["group"].iloc[0])
        with pd.ExcelWriter(out / f"{pid}_ses-{session}.xlsx", engine="openpyxl") as book:
            pd.DataFrame({"note": ["invented data"]}).to_excel(book, sheet_name="notes", index=False)
            table.to_excel(book, sheet_name="trials", index=False)


def bids_beh(log: pd.DataFrame, out: Path) -> None:
    """A BIDS dataset: sub-<id>/ses-<n>/beh/*_beh.tsv, participants.tsv with the groups."""
    (out / "dataset_description.json").write_text(json.dumps(
        {"Name": "Lantern relay (invented example)", "BIDSVersion": "1.10.0"}, indent=2) + "\n")
    people = log[["participant", "group"]].drop_duplicates()
    (out / "participants.tsv").write_bytes(to_tsv(pd.DataFrame(
        {"participant_id": "sub-" + people["participant"], "group": people["group"]})))
    for (pid, session), rows in log.groupby(["participant", "session"]):
        folder = out / f"sub-{pid}" / f"ses-{session}" / "beh"
        folder.mkdir(parents=True)
        table = rows[["block", "trial", "stimulus", "response", "rt"]].rename(columns={"rt": "response_time"})
        table = table.assign(response=table["response"].replace("", None))
        (folder / f"sub-{pid}_ses-{session}_task-lanterns_beh.tsv").write_bytes(to_tsv(table))


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description="Write the example files of every shipped profile's layout.")
    parser.add_argument("--force", action="store_true", help="replace existing example files")
    args = parser.parse_args(argv)
    targets = [HERE / "canonical.csv", *(HERE / name for name in LAYOUTS)]
    existing = [str(p) for p in targets if p.exists()]
    if existing and not args.force:
        print(f"error: {', '.join(existing)} exist; pass --force to replace them", file=sys.stderr)
        return 2
    log = canonical()
    log.to_csv(HERE / "canonical.csv", index=False)
    for name, write in zip(LAYOUTS, (builder_csv, browser_json, spreadsheet, bids_beh)):
        folder = HERE / name
        shutil.rmtree(folder, ignore_errors=True)
        folder.mkdir()
        write(log, folder)
    print(f"wrote canonical.csv and {', '.join(LAYOUTS)} in {HERE}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
