"""One compiled model per structure: data through pm.Data, nutpie by default, PyMC's NUTS as the named fallback."""

from __future__ import annotations

import importlib.util

import numpy as np
import pytest

from foretell.hierarchical import sampling
from foretell.hierarchical.measure_model import build_measure_model, measure_data, pool_measure
from foretell.hierarchical.sampling import Structure, sample, structure
from foretell.logs import validate_log
from foretell.measure import choose_measure
from foretell.models import model_specs
from foretell.regressors import regressors
from foretell.simulate import simulate_participants
from foretell.steps.measures import analyze_rt


def _location_model(centre: float):
    import pymc as pm

    with pm.Model() as model:
        y = pm.Data("y", np.array([centre - 0.1, centre, centre + 0.1]))
        pm.Normal("y_obs", pm.Normal("mu", 0.0, 10.0), 1.0, observed=y, shape=y.shape)
    return model


def test_without_nutpie_pymc_samples_the_new_data_and_says_so(monkeypatch):
    real = importlib.util.find_spec
    monkeypatch.setattr(importlib.util, "find_spec", lambda name, *a: None if name == "nutpie" else real(name, *a))
    assert sampling.sampler_name() == "pymc"
    idata, which, messages = sample(Structure(_location_model(0.0)), data={"y": np.array([4.9, 5.0, 5.1])},
                                    draws=100, tune=100, chains=2, seed=1)
    assert which == "pymc"
    assert any("nutpie is not available: PyMC's own NUTS sampled instead" in m for m in messages)
    # the posterior of mu ~ Normal(5, 1/sqrt(3)) given the new data, not the data the model was built with
    assert abs(float(idata.posterior["mu"].mean()) - 5.0) < 0.5
    assert set(idata.posterior.data_vars) == {"mu"}


def test_structures_are_built_once_per_key():
    built = []

    def build():
        built.append(1)
        return _location_model(0.0)

    first = structure(("test", "location"), build)
    assert structure(("test", "location"), build) is first and len(built) == 1
    assert structure(("test", "other"), build) is not first and len(built) == 2


@pytest.fixture(scope="module")
def rt_case(lantern):
    frame, _ = simulate_participants(lantern, 5, 2, models=["count-1"], seed=4, block_length=80)
    return validate_log(frame, lantern)


@pytest.mark.slow  # minutes (a nutpie compilation); test_structures_are_built_once_per_key is the light one
def test_one_compilation_serves_every_learner_model_the_baseline_and_the_refits(rt_case, lantern, monkeypatch):
    import nutpie

    compiled = []
    real = nutpie.compile_pymc_model

    def counting(model, **options):
        compiled.append(model)
        return real(model, **options)

    monkeypatch.setattr(nutpie, "compile_pymc_model", counting)
    monkeypatch.setattr(sampling, "_STRUCTURES", type(sampling._STRUCTURES)())
    result = analyze_rt(rt_case, lantern, models=["count-0", "count-1", "count-2"], draws=60, tune=60, chains=2,
                        seed=3, hierarchical_models="all", loo=True, refits=2)
    assert set(result.diagnostics["model"]) == {"count-0", "count-1", "count-2", "none"}
    assert (result.diagnostics["sampler"] == "nutpie").all()
    assert len(compiled) == 1  # three learners, the baseline and every exact refit: one structure
    # the same compiled model on new data equals a model built and compiled afresh for those data, same seed
    specs = model_specs(["count-0", "count-1", "count-2"], lantern)
    chosen = choose_measure(rt_case, lantern, specs, "rt", rt_case.frame["rt"].to_numpy(float))
    table = regressors(rt_case, lantern, specs)
    columns = {c: table[c].to_numpy() for c in (*chosen.columns, "leak", "alpha", "params_from")}
    pooled = pool_measure(chosen, rt_case.frame, columns, 2, 3)
    forms = {"intercept": "non-centred", "practice": "non-centred", "slope": "centred"}
    run = {"draws": 60, "tune": 60, "chains": 2, "seed": 5}
    shared, _, _ = sample(sampling._STRUCTURES[next(iter(sampling._STRUCTURES))], data=measure_data(pooled, forms),
                          **run)
    fresh, _, _ = sample(Structure(build_measure_model(pooled)), data=measure_data(pooled, forms), **run)
    assert len(compiled) == 2
    for name in ("mu_b", "slope_mean", "sigma", "a"):
        np.testing.assert_allclose(shared.posterior[name].to_numpy(), fresh.posterior[name].to_numpy(), rtol=1e-8)
