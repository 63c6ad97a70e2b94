"""Shared fixtures: the shipped demo task files."""

from __future__ import annotations

from pathlib import Path

import pytest

from foretell.tasks import Task, load_task

TASKS = Path(__file__).resolve().parents[1] / "tasks"


@pytest.fixture(scope="session")
def lantern() -> Task:
    """Three symbols, contexts of depth 1 to 3."""
    return load_task(TASKS / "lantern-relay.toml")


@pytest.fixture(scope="session")
def tide() -> Task:
    """Two symbols, contexts of depth 1 and 2."""
    return load_task(TASKS / "tide-gauge.toml")


@pytest.fixture(scope="session")
def compass() -> Task:
    """Four symbols, memoryless."""
    return load_task(TASKS / "compass-fair.toml")
