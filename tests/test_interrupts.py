"""Runs that are interrupted or collide: a signal during MCMC sampling, two commands into one folder."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import textwrap
import time
from pathlib import Path

import pytest

# The command runs in a child Python whose pm.sample first leaves a marker file, so the
# signal is sent once sampling has begun (not while the log is still being read).
RUNNER = textwrap.dedent("""
    import sys
    from pathlib import Path
    import pymc as pm
    _sample = pm.sample
    def _marked(*args, **kwargs):
        Path(sys.argv[1]).touch()
        return _sample(*args, **kwargs)
    pm.sample = _marked
    from foretell.cli import main
    sys.exit(main(sys.argv[2:]))
""")


@pytest.fixture(scope="module")
def rt_log(tmp_path_factory) -> Path:
    from foretell.simulate import simulate_participants
    from foretell.tasks import load_task

    task = load_task("tide-gauge")
    frame, _ = simulate_participants(task, n_participants=4, n_blocks=2, block_length=60,
                                     models=["count-1"], seed=3)
    path = tmp_path_factory.mktemp("log") / "rt.csv"
    frame.to_csv(path, index=False)
    return path


def _group_alive(pgid: int) -> bool:
    """Return True when a live (non-zombie) process remains in the process group."""
    out = subprocess.run(["ps", "-o", "pid=,stat=", "-g", str(pgid)], capture_output=True, text=True)
    return any(not line.split()[1].startswith("Z") for line in out.stdout.splitlines() if line.strip())


@pytest.mark.slow  # a lighter test (tests/test_hierarchical.py) covers an interrupted sampler in-process
@pytest.mark.parametrize("sig, status", [(signal.SIGINT, 130), (signal.SIGTERM, 128 + signal.SIGTERM)])
def test_a_signal_during_sampling_exits_writes_nothing_and_leaves_no_process(rt_log, tmp_path, sig, status):
    marker, out = tmp_path / "sampling", tmp_path / "res"
    command = [sys.executable, "-c", RUNNER, str(marker), "rt", str(rt_log), "--task", "tide-gauge",
               "--out", str(out), "--models", "count-0,count-1", "--draws", "20000", "--tune", "200",
               "--chains", "2", "--jobs", "2"]
    proc = subprocess.Popen(command, stdout=subprocess.PIPE, stderr=subprocess.PIPE, start_new_session=True)
    started = time.monotonic()
    while not marker.exists() and proc.poll() is None and time.monotonic() - started < 240:
        time.sleep(0.2)
    assert marker.exists(), proc.communicate()[1].decode()
    time.sleep(3)  # inside pm.sample: compiling or drawing
    os.killpg(proc.pid, sig)  # as a terminal's Ctrl-C or a batch system's kill reaches the whole group
    _, err = proc.communicate(timeout=120)
    assert proc.returncode == status, err.decode()
    assert b"Traceback" not in err
    assert not out.exists()
    assert sorted(p.name for p in tmp_path.iterdir()) == ["sampling"]  # no partial folder, no lock left
    deadline = time.monotonic() + 10
    while _group_alive(proc.pid) and time.monotonic() < deadline:
        time.sleep(0.5)
    assert not _group_alive(proc.pid)


@pytest.mark.slow  # tests/test_outputs.py races two lighter processes through the same lock
def test_two_commands_into_one_folder_one_succeeds_and_the_folder_is_whole(rt_log, tmp_path):
    import json

    out = tmp_path / "res"
    command = [sys.executable, "-m", "foretell.cli.main", "fit", str(rt_log), "--task", "tide-gauge",
               "--out", str(out), "--models", "count-0,count-1"]
    runs = [subprocess.Popen(command, stdout=subprocess.PIPE, stderr=subprocess.PIPE) for _ in range(2)]
    results = [(run.wait(timeout=240), run.stderr.read().decode()) for run in runs]
    assert sorted(code for code, _ in results) == [0, 1], results
    refused = next(err for code, err in results if code == 1)
    assert "another foretell run is writing" in refused and "Traceback" not in refused
    manifest = json.loads((out / "manifest.json").read_text())
    written = sorted(p.relative_to(out).as_posix() for p in out.rglob("*") if p.is_file())
    assert written == sorted([*manifest["files"], "manifest.json"])
    assert sorted(p.name for p in tmp_path.iterdir()) == ["res"]
