"""Tests of foretell.models: model identifiers, default set, free parameters and bounds."""

from __future__ import annotations

from pathlib import Path

import pytest

from foretell.errors import UsageError
from foretell.learners import Counting, Source, TaskCounting, TreeMixture
from foretell.models import PARAMS, default_models, model_specs, parse_model
from foretell.tasks import load_task

TASKS = Path(__file__).resolve().parents[1] / "tasks"


def test_default_models_follow_the_issue(lantern, compass):
    # issue 4: count-0 ... count-K, K = max(max_depth + 1, 3); both leaky models; count-task;
    # mix-K; source.
    assert default_models(lantern) == ["count-0", "count-1", "count-2", "count-3", "count-4",
                                       "count-0-leak", "count-1-leak", "count-task", "mix-4", "source"]
    assert default_models(compass)[:4] == ["count-0", "count-1", "count-2", "count-3"]
    assert "mix-3" in default_models(compass) and "count-4" not in default_models(compass)


def test_parameter_bounds_follow_the_issue():
    assert (PARAMS["inv_temp"].low, PARAMS["inv_temp"].high) == (0.01, 50.0)
    assert (PARAMS["lapse"].low, PARAMS["lapse"].high) == (1e-4, 0.5)
    assert (PARAMS["leak"].low, PARAMS["leak"].high) == (0.0, 0.95)
    for p in PARAMS.values():
        assert p.low <= p.start <= p.high


@pytest.mark.parametrize("model_id, depth, free, kind", [
    ("count-0", 0, ("inv_temp", "lapse"), Counting),
    ("count-5", 5, ("inv_temp", "lapse"), Counting),
    ("count-1-leak", 1, ("inv_temp", "lapse", "leak"), Counting),
    ("count-task", 3, ("inv_temp", "lapse"), TaskCounting),
    ("mix-4", 4, ("inv_temp", "lapse"), TreeMixture),
    ("source", 3, ("inv_temp", "lapse"), Source),
])
def test_parse_model(lantern, model_id, depth, free, kind):
    spec = parse_model(model_id, lantern)
    assert spec.model_id == model_id and spec.depth == depth and spec.free == free
    learner = spec.learner()
    assert isinstance(learner, kind)
    assert learner.depth == spec.depth  # the warm-up depth agrees with the learner's own


def test_freeing_leak_and_alpha_only_where_the_learner_has_them(lantern):
    free = ("leak", "alpha")
    assert parse_model("count-2", lantern, free).free == ("inv_temp", "lapse", "leak", "alpha")
    assert parse_model("count-0-leak", lantern, ["alpha"]).free == ("inv_temp", "lapse", "leak", "alpha")
    assert parse_model("count-task", lantern, free).free == ("inv_temp", "lapse", "leak", "alpha")
    assert parse_model("mix-3", lantern, free).free == ("inv_temp", "lapse", "alpha")  # no leak
    assert parse_model("source", lantern, free).free == ("inv_temp", "lapse")


def test_learner_gets_fitted_values_and_defaults(lantern):
    spec = parse_model("count-1-leak", lantern)
    learner = spec.learner(leak=0.25, inv_temp=3.0)
    assert (learner.depth, learner.leak, learner.alpha) == (1, 0.25, 0.5)
    assert parse_model("count-1", lantern).learner().leak == 0.0


@pytest.mark.parametrize("bad", ["count", "count-x", "count-1-leaky", "mix-", "mix-2-leak",
                                 "source-1", "count-task-leak", ""])
def test_unknown_identifiers_are_refused(lantern, bad):
    with pytest.raises(UsageError, match="unknown model"):
        parse_model(bad, lantern)


def test_bad_free_names_and_duplicates_are_refused(lantern):
    with pytest.raises(UsageError, match="cannot free"):
        parse_model("count-1", lantern, ["inv_temp"])
    with pytest.raises(UsageError, match="twice"):
        model_specs(["count-1", "count-1"], lantern)
    assert [s.model_id for s in model_specs(None, lantern)] == default_models(lantern)


@pytest.mark.parametrize("spelling, canonical", [("count-01", "count-1"), (" Count-1 ", "count-1"),
                                                 ("count-002-leak", "count-2-leak"), ("MIX-04", "mix-4"),
                                                 ("count-task", "count-task")])
def test_model_ids_are_normalised(lantern, spelling, canonical):
    assert parse_model(spelling, lantern).model_id == canonical


def test_the_same_model_under_two_spellings_is_refused(lantern):
    with pytest.raises(UsageError, match="listed twice.*count-1"):
        model_specs(["count-01", "count-1"], lantern)


def test_model_depth_beyond_the_learners_limit_is_refused_before_fitting(lantern):
    with pytest.raises(UsageError, match="at most 12 back"):
        parse_model("count-13", lantern)


def test_family_and_signature(lantern):
    fair = load_task("compass-fair")  # memoryless: count-task counts what count-0 counts
    assert parse_model("count-task", fair).signature == parse_model("count-0", fair).signature
    assert parse_model("count-task", lantern).signature != parse_model("count-3", lantern).signature
    assert [parse_model(m, lantern).family for m in ("count-1-leak", "count-2", "mix-4", "source")] == [
        "shallow", "deep", "deep", None]
    assert parse_model("count-task", fair).family == "shallow"
