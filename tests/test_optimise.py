"""Tests of foretell.fitting.optimise: the batched choice-rule sums, projected Newton and Brent's method."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.optimize import approx_fprime, minimize, minimize_scalar

from foretell.choice import choice_terms
from foretell.fitting.optimise import Batch, ChoiceSpace, brent, choice_sums, newton


def _data(seed: int, n: int = 300, m: int = 3):
    rng = np.random.default_rng(seed)
    log_pred = np.log(rng.dirichlet(np.ones(m), size=n))
    guess = rng.integers(0, m, size=n)
    return log_pred, guess


def test_sums_match_choice_terms_and_hessian_matches_finite_differences():
    # value and gradient against foretell.choice.choice_terms; the Hessian against central
    # differences of that gradient (scipy.optimize.approx_fprime, reference library; Virtanen et al., 2020)
    log_pred, guess = _data(1)
    ptr, idx = np.array([0, 300]), np.arange(300)
    for point in ([1.7, 0.08], [0.3, 0.4], [6.0, 0.001]):
        sums = choice_sums(log_pred, guess, ptr, idx, np.array([0]), [point[0]], [point[1]])[0]
        logp, d_b, d_l = choice_terms(log_pred, guess, *point)
        np.testing.assert_allclose(sums[:3], [logp.sum(), d_b.sum(), d_l.sum()], rtol=1e-10)

        def grad(v):
            terms = choice_terms(log_pred, guess, v[0], v[1])
            return np.array([terms[1].sum(), terms[2].sum()])

        step = 1e-6 * np.array(point)  # relative steps: the lapse curvature grows as 1/lapse^2
        numeric = np.array([approx_fprime(np.array(point), lambda v: grad(v)[i], step) for i in range(2)])
        np.testing.assert_allclose([sums[3], sums[4], sums[5]],
                                   [numeric[0, 0], 0.5 * (numeric[0, 1] + numeric[1, 0]), numeric[1, 1]],
                                   rtol=1e-4, atol=1e-6)


def test_newton_finds_the_bounded_optimum_of_every_row_at_once():
    # each row against scipy's bounded L-BFGS-B on the same function (reference library; Virtanen et al., 2020)
    log_pred, guess = _data(2, n=400)
    ptr = np.array([0, 400, 550, 700])
    idx = np.r_[np.arange(400), np.arange(150), np.arange(250, 400)]
    batch = Batch(log_pred, guess, ptr, idx)
    space = ChoiceSpace.make(("inv_temp", "lapse"), {})
    res = newton(batch, space, np.tile(space.start(), (3, 1)))
    assert res.converged.all()
    for r in range(3):
        rows = idx[ptr[r]:ptr[r + 1]]
        ref = minimize(lambda v: -choice_terms(log_pred[rows], guess[rows], math.exp(v[0]), v[1])[0].sum(),
                       space.start(), method="L-BFGS-B", bounds=list(map(tuple, space.bounds)))
        assert res.nll[r] <= ref.fun + 1e-8


def test_brent_generator_finds_a_bounded_minimum():
    # against scipy.optimize.minimize_scalar(method="bounded") (reference library; Virtanen et al., 2020)
    f = lambda x: (x - 0.3) ** 2 + 0.1 * x ** 3 + 0.05 * math.sin(x)  # noqa: E731  (unimodal on [0, 1])
    search = brent(0.0, 1.0, 0.9, f(0.9))
    x = next(search)
    try:
        while True:
            x = search.send(f(x))
    except StopIteration as stop:
        best, value, ok = stop.value
    ref = minimize_scalar(f, bounds=(0.0, 1.0), method="bounded", options={"xatol": 1e-9})
    assert ok and best == pytest.approx(ref.x, abs=1e-6) and value <= f(0.9)


def test_a_row_does_not_depend_on_the_other_rows_of_its_batch():
    # rows are solved independently, so batching (and hence n_jobs) cannot change a result
    log_pred, guess = _data(3, n=500)
    ptr = np.array([0, 500, 650, 900])
    idx = np.r_[np.arange(500), np.arange(150), np.arange(250, 500)]
    batch = Batch(log_pred, guess, ptr, idx)
    space = ChoiceSpace.make(("inv_temp", "lapse"), {})
    starts = np.array([space.start(), [2.0, 0.3], [-1.0, 0.01]])
    together = newton(batch, space, starts)
    for r in range(3):
        alone = newton(batch, space, starts[r][None], np.array([r]))
        assert alone.z[0].tolist() == together.z[r].tolist() and alone.nll[0] == together.nll[r]


def test_newton_with_lapse_held_matches_a_bounded_scalar_search():
    # one free coordinate (log inv_temp), lapse held at 0.1; reference: scipy.optimize.minimize_scalar
    # (method="bounded", reference library; Virtanen et al., 2020) on the same function
    log_pred, guess = _data(4, n=300, m=4)
    batch = Batch(log_pred, guess, np.array([0, 300]), np.arange(300))
    space = ChoiceSpace.make(("inv_temp",), {"lapse": 0.1})
    res = newton(batch, space, space.start()[None])
    lo, hi = space.bounds[0]
    ref = minimize_scalar(lambda v: -choice_terms(log_pred, guess, math.exp(v), 0.1)[0].sum(), bounds=(lo, hi),
                          method="bounded", options={"xatol": 1e-10})
    assert res.converged[0] and res.z[0, 1] == 0.0
    assert res.nll[0] <= ref.fun + 1e-9 and res.z[0, 0] == pytest.approx(ref.x, abs=1e-5)
