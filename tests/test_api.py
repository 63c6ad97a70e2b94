"""The public API: every step shows its real signature and uses the same names for the same things."""

from __future__ import annotations

import inspect

import numpy as np
import pytest

import foretell
from foretell.errors import UsageError
from foretell.validation import check_count, check_n_jobs, check_option, check_seed, child_int, child_rng

# One name per concept across steps; the names on the right were used by earlier versions.
RETIRED = {"cores": "n_jobs", "fits": "fit", "from_fits": "fit", "fit_result_or_tables": "fit",
           "random_state": "seed", "rng": "seed", "trials": "trial_counts (recover) or trials (fit tables)"}
SHARED_DEFAULTS = {"seed": 0, "n_jobs": 1, "progress": None, "draws": 1000, "chains": 4, "tune": 1000,
                   "models": None, "fit": None}


def _signature(name: str) -> inspect.Signature:
    return inspect.signature(getattr(foretell, name))


@pytest.mark.parametrize("name", foretell.STEPS)
def test_every_step_shows_real_parameters(name):
    parameters = _signature(name).parameters.values()
    assert parameters, name
    kinds = {p.kind for p in parameters}
    assert inspect.Parameter.VAR_POSITIONAL not in kinds and inspect.Parameter.VAR_KEYWORD not in kinds


@pytest.mark.parametrize("name", foretell.STEPS)
def test_every_step_uses_one_name_and_one_default_per_concept(name):
    parameters = _signature(name).parameters
    for old in RETIRED:
        if old == "trials" and name in ("fit", "analyze"):
            continue  # there, trials chooses the rows of trials.csv
        assert old not in parameters, f"{name}: {old!r} is now {RETIRED[old]!r}"
    for option, default in SHARED_DEFAULTS.items():
        if option in parameters:
            assert parameters[option].default == default, (name, option)
            assert parameters[option].kind is inspect.Parameter.KEYWORD_ONLY, (name, option)
    if name != "recover":  # the design check simulates its participants: it reads no log
        assert list(parameters)[:2] == ["log", "task"], name
    for option in ("n_jobs", "progress"):
        assert option in parameters, (name, option)
    if name != "export_events":  # the events export draws no random numbers
        assert "seed" in parameters, name


def test_steps_reusing_fits_take_them_as_fit():
    for name in ("analyze_rt", "compare_groups", "export_events", "recover"):
        assert "fit" in _signature(name).parameters, name


def test_lazy_names_are_the_real_functions():
    from foretell.steps.guesses import fit

    assert foretell.fit is fit
    with pytest.raises(AttributeError):
        foretell.no_such_step  # noqa: B018


def test_counts_options_and_seeds_are_checked_in_words():
    assert check_count("draws", 10, 10) == 10
    for bad in (9, 2.5, "10", True, None):
        with pytest.raises(UsageError, match="draws must be a whole number >= 10"):
            check_count("draws", bad, 10)
    with pytest.raises(UsageError, match=r"did you mean 'bic'"):
        check_option("criterion", "bci", ("bic", "cv"))
    with pytest.raises(UsageError, match="0 cannot run anything"):
        check_n_jobs(0)
    with pytest.raises(UsageError, match="n_jobs must be a whole number"):
        check_n_jobs("2")
    with pytest.raises(UsageError, match="seed must be a whole number >= 0"):
        check_seed(-1)
    assert check_seed(np.random.default_rng(3)) == check_seed(np.random.default_rng(3))


def test_child_streams_depend_on_labels_not_on_order():
    a = child_rng(7, "p01", "count-1").random(3)
    np.testing.assert_array_equal(a, child_rng(7, "p01", "count-1").random(3))
    assert not np.array_equal(a, child_rng(7, "p02", "count-1").random(3))
    assert not np.array_equal(a, child_rng(8, "p01", "count-1").random(3))
    # labels are kept apart: ("ab",) is not ("a", "b"), and 1 is not "1"
    assert child_int(0, "ab") != child_int(0, "a", "b")
    assert child_int(0, 1) != child_int(0, "1")


def test_a_log_validated_against_another_task_is_refused_by_every_step():
    # A log's symbols are indices into its task's alphabet: read against another task they
    # would silently become other symbols.
    from foretell.simulate import simulate_participants
    from foretell.logs import validate_log

    tide, lanterns = foretell.load_task("tide-gauge"), foretell.load_task("lantern-relay")
    frame, _ = simulate_participants(lanterns, n_participants=2, n_blocks=2, models=["count-1"], seed=1,
                                     block_length=20)
    log = validate_log(frame, lanterns)
    for step in (foretell.fit, foretell.analyze_rt, foretell.export_events):
        with pytest.raises(UsageError, match="validated against task 'lantern-relay', not 'tide-gauge'"):
            step(log, tide)


def test_figures_of_non_latin_ids_raise_no_library_warning(recwarn):
    from foretell.plots.common import figure_png, new_figure

    fig, (ax,) = new_figure()
    ax.set_title("参加者 p01")  # the default font has no CJK glyphs
    assert figure_png(fig)[:8] == b"\x89PNG\r\n\x1a\n"
    assert not [w for w in recwarn if "Glyph" in str(w.message)]
