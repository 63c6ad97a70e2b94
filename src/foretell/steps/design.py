"""Parameter and model recovery on a task's own design: simulate, fit as the analysis does, tabulate.

Before data are collected, one should show that the candidate models can be
told apart and their parameters recovered on the experiment's own design, and
so choose the number of trials per participant and of participants (Wilson &
Collins, 2019, "Ten simple rules for the computational modeling of
behavioral data", eLife 8:e49547, rules 5-6). :func:`recover` simulates
participants from every candidate model (:mod:`foretell.simulate`) at each
listed trial count, fits every candidate with the analysis's own fitter
(:func:`foretell.fitting.participants.fit_participants`) and reports the confusion
matrix, its inversion, true against fitted parameters and a group-level
check with random-effects model selection.

Everything here assumes that participants behave as one of the candidate
models with parameters in the simulated ranges: recovery on simulated data
is a necessary condition for trusting the fits of real data, not a
sufficient one.
"""

from __future__ import annotations

import math
import sys
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from functools import cached_property
from typing import TYPE_CHECKING

import numpy as np
import pandas as pd
from scipy import stats
from tqdm import tqdm

from foretell.errors import InputError, Problem, UsageError
from foretell.fitting.participants import fit_participants
from foretell.logs import validate_log
from foretell.models import ModelSpec, model_specs, normalise_model_id
from foretell.params import PARAMS
from foretell.simulate import ParticipantSpec, simulate_participant
from foretell.tasks import Task

from foretell.stats.selection import rfx_bms

if TYPE_CHECKING:
    from matplotlib.figure import Figure

DEFAULT_RANGES: dict[str, tuple[float, float]] = {
    "inv_temp": (0.5, 4.0),
    "lapse": (0.01, 0.06),
    "leak": (0.05, 0.4),
}
"""Uniform ranges the simulated participants' parameters are drawn from (leak: leaky models only).

inv_temp from near-random (0.5) to sharply maximising (4) guessing, 1-6% of
guesses at random, 5-40% of every count forgotten per trial. Overridable per
parameter through ``recover(ranges=...)``; every range must lie within the
fitter's bounds (:data:`foretell.params.PARAMS`), so the truth is reachable.
"""

TIE_BIC = 1e-9
"""BIC differences below this are ties: the tied models share the participant's credit equally."""
CI_LEVEL = 0.95
"""Level of the Clopper-Pearson intervals of the confusion fractions."""
TARGET_DIAGONAL = 0.9
"""Design check threshold on every model's recovery fraction (chosen for this check, not a published standard)."""
TARGET_SPEARMAN = 0.7
"""Design check threshold on every parameter's Spearman correlation (chosen here, not a published standard)."""
GROUP_RESAMPLES = 50
"""Bootstrap resamples of each cell's participants for the group-level check (besides the whole cell)."""
MERGE_SEP = "="
"""Joins the ids of look-alike models counted as one (e.g. ``count-0=count-task``)."""


# -- the result ------------------------------------------------------------------------------
@dataclass(frozen=True)
class RecoveryResult:
    """The tables, answer and notes of a recovery study (see :func:`recover` for the columns)."""

    confusion: pd.DataFrame
    inversion: pd.DataFrame
    params: pd.DataFrame
    recovery_summary: pd.DataFrame
    group_check: pd.DataFrame
    answer: str
    notes: tuple[str, ...] = ()
    settings: Mapping[str, object] = field(default_factory=dict)

    def tables(self) -> dict[str, pd.DataFrame]:
        """Return every output table by name (the CSV file stems)."""
        return {"confusion": self.confusion, "inversion": self.inversion, "params": self.params,
                "recovery_summary": self.recovery_summary, "group_check": self.group_check}

    @cached_property
    def figures(self) -> dict[str, "Figure"]:
        """Return the figures by name: ``confusion_<T>`` and ``params_<T>`` per trial count, ``recovery``."""
        from foretell import figures

        out: dict[str, Figure] = {}
        for trials, cell in self.confusion.groupby("trials", sort=True):
            out[f"confusion_{trials}"] = figures.confusion_heatmap(
                cell, title=f"Model recovery at {trials} trials per participant")
        for trials, cell in self.params.groupby("trials", sort=True):
            out[f"params_{trials}"] = figures.true_vs_fitted(
                cell, title=f"Parameter recovery at {trials} trials per participant")
        out["recovery"] = figures.recovery_by_trials(self.confusion, self.recovery_summary,
                                                     TARGET_DIAGONAL, TARGET_SPEARMAN, CI_LEVEL)
        return out


# -- the public entry point --------------------------------------------------------------------
def recover(task: Task, models: Sequence[str], *, n_participants: int, trials: Sequence[int],
            ranges: Mapping[str, tuple[float, float]] | None = None,
            from_fits: pd.DataFrame | None = None, seed: int = 0, n_jobs: int = 1,
            progress: bool | None = None, merge_lookalikes: bool = False) -> RecoveryResult:
    """Return the model and parameter recovery (:class:`RecoveryResult`) of ``models`` on ``task``.

    For every trial count T in ``trials`` and every generating model g,
    ``n_participants`` participants are simulated with g (one session, the
    task's block length, the last block shorter when T is not a multiple),
    parameters drawn uniformly from :data:`DEFAULT_RANGES` updated with
    ``ranges``, or resampled from the converged fits of g in ``from_fits``
    (a fits table with participant, model, inv_temp, lapse, converged, and
    leak for leaky models; models without fits fall back to the ranges, and
    the notes say so). Every model is fitted to every participant with
    :func:`foretell.fitting.participants.fit_participants` (no cross-validation, no block
    refits) and the best model by BIC is recovered; models within
    :data:`TIE_BIC` of the best share the credit equally; fits that did not
    converge are left out as in the analysis's winners. Look-alike models
    (equal ``ModelSpec.signature`` and free parameters: identical predictions)
    split their credit unless ``merge_lookalikes``, which simulates and fits
    them once under the joined name (``count-0=count-task``).

    Cell (T, g) draws from ``SeedSequence(seed, spawn_key=(T, position of g))``,
    so a cell does not change when other trial counts are added; ``n_jobs``
    goes to the fitter and does not change the tables; ``progress`` shows a
    bar on stderr (None: when stderr is a terminal).

    Tables:

    - ``confusion``: trials, generating_model, fitted_model, fraction (credited
      participants / n), ci_low, ci_high (Clopper-Pearson exact interval at
      :data:`CI_LEVEL` on the credited count rounded to a whole number, halves
      to even, since split credit can make it fractional), n
      (participants with at least one usable fit). Fractions sum to 1 per
      trials x generating_model (NaN when n = 0).
    - ``inversion``: trials, fitted_model, generating_model, fraction =
      P(generating | fitted) under a uniform prior over generating models,
      n (credited participants with that winner, fractional with ties).
    - ``params``: trials, model (generating), participant, parameter, true,
      fitted (by the generating model itself), converged.
    - ``recovery_summary``: trials, model, parameter, spearman (rank
      correlation of true and fitted), bias (mean fitted - true), rmse, n
      (converged fits).
    - ``group_check``: trials, generating_model, fitted_model, share (share of
      groups in which random-effects BMS on -BIC/2 (Stephan et al., 2009)
      gives that model the highest protected exceedance probability (Rigoux
      et al., 2014); ties share), n_groups, group_size. The groups are the
      whole cell and :data:`GROUP_RESAMPLES` bootstrap resamples of its
      participants: resamples are not new participants, so the share says how
      stable the group verdict is at this group size, not how often a new
      study would reach it.
    """
    plan = _Plan.make(task, models, merge_lookalikes)
    n_participants = _whole("n_participants", n_participants)
    trial_counts = _trial_counts(trials, plan.warmup)
    bounds = _ranges(ranges)
    seed = _whole("seed", seed, 0)
    if isinstance(n_jobs, bool) or not isinstance(n_jobs, (int, np.integer)) or n_jobs == 0:
        raise UsageError(f"n_jobs must be a positive count or negative (-1: all cores); got {n_jobs!r}")
    notes = list(plan.notes)
    drawers = {g: _drawer(task, plan.specs[g], bounds, from_fits, notes) for g in plan.labels}
    show = sys.stderr.isatty() if progress is None else bool(progress)
    cells = [(t, i, g) for t in trial_counts for i, g in enumerate(plan.labels)]
    results = []
    with tqdm(total=len(cells), desc="recovery", unit="cell", disable=not show,
              file=sys.stderr) as bar:
        for t, i, g in cells:
            sim_seq, fit_seq, group_seq = np.random.SeedSequence(seed, spawn_key=(t, i)).spawn(3)
            results.append(_run_cell(task, plan, g, drawers[g], n_participants, t, sim_seq,
                                     fit_seq, group_seq, n_jobs))
            bar.set_postfix_str(f"{g} at {t} trials")
            bar.update()
    credit = pd.concat([r.credit for r in results], ignore_index=True)
    params = pd.concat([r.params for r in results], ignore_index=True)
    group_check = pd.concat([r.groups for r in results], ignore_index=True)
    notes += [n for r in results for n in r.notes]
    confusion = _confusion(credit, trial_counts, plan.labels)
    inversion = _inversion(confusion)
    summary = _summary(params, notes)
    answer = _answer(confusion, summary, n_participants)
    settings = {"task": task.name, "models": list(plan.labels), "n_participants": n_participants,
                "trials": list(trial_counts), "ranges": bounds, "from_fits": from_fits is not None,
                "seed": seed, "merge_lookalikes": bool(merge_lookalikes)}
    return RecoveryResult(confusion, inversion, params, summary, group_check, answer, tuple(notes),
                          settings)


# -- the plan: model labels, look-alikes, validated arguments -----------------------------------
@dataclass(frozen=True)
class _Plan:
    """The models to simulate and fit: one label per distinct model, the spec fitted under it."""

    labels: tuple[str, ...]
    specs: Mapping[str, ModelSpec]
    notes: tuple[str, ...]

    @property
    def warmup(self) -> int:
        """Return the unscored trials at the start of a session (the deepest model's depth)."""
        return max(s.depth for s in self.specs.values())

    def label_of(self) -> dict[str, str]:
        """Return the label of each fitted model id."""
        return {s.model_id: label for label, s in self.specs.items()}

    @classmethod
    def make(cls, task: Task, models: Sequence[str], merge: bool) -> "_Plan":
        if isinstance(models, str):
            models = [m for m in models.split(",") if m.strip()]
        specs = model_specs(list(models), task)
        if len(specs) < 2:
            raise UsageError(f"recovery compares models: give at least two, got {len(specs)}")
        alike: dict[tuple, list[ModelSpec]] = {}
        for spec in specs:
            alike.setdefault((spec.signature, spec.free), []).append(spec)
        twins = [group for group in alike.values() if len(group) > 1]
        notes = []
        if merge:
            chosen = {MERGE_SEP.join(s.model_id for s in group): group[0] for group in alike.values()}
            notes += [f"{', '.join(s.model_id for s in g)} make identical predictions on {task.name}: "
                      f"simulated and fitted once, as {MERGE_SEP.join(s.model_id for s in g)}"
                      for g in twins]
        else:
            chosen = {s.model_id: s for s in specs}
            notes += [f"{' and '.join(s.model_id for s in g)} make identical predictions on "
                      f"{task.name}: they tie on every participant and share the credit "
                      f"(merge_lookalikes counts them as one model)" for g in twins]
        return cls(tuple(chosen), chosen, tuple(notes))


def _whole(name: str, value: object, low: int = 1) -> int:
    """Return ``value`` as an int; raise UsageError unless it is a whole number >= ``low``."""
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < low:
        raise UsageError(f"{name} must be a whole number of at least {low}, got {value!r}")
    return int(value)


def _trial_counts(trials: Sequence[int], warmup: int) -> tuple[int, ...]:
    """Return the trial counts in increasing order after checking them."""
    if isinstance(trials, (int, np.integer)):
        trials = [trials]
    counts = [_whole("every trial count", t, warmup + 2) for t in trials]
    if not counts:
        raise UsageError("give at least one trial count")
    if len(set(counts)) != len(counts):
        raise UsageError(f"trial counts listed twice: {sorted({t for t in counts if counts.count(t) > 1})}")
    return tuple(sorted(counts))


def _ranges(ranges: Mapping[str, tuple[float, float]] | None) -> dict[str, tuple[float, float]]:
    """Return :data:`DEFAULT_RANGES` updated with ``ranges``, each checked against the fit bounds."""
    out = dict(DEFAULT_RANGES)
    for name, pair in (ranges or {}).items():
        if name not in DEFAULT_RANGES:
            raise UsageError(f"cannot set a range for {name!r}: ranges exist for "
                             f"{', '.join(DEFAULT_RANGES)}")
        try:
            low, high = (float(v) for v in pair)
        except (TypeError, ValueError):
            raise UsageError(f"the range of {name} must be two numbers (low, high), got {pair!r}") from None
        p = PARAMS[name]
        if not (p.low <= low <= high <= p.high) or (name == "leak" and low <= 0):
            floor = "above 0" if name == "leak" else f"from {p.low:g}"
            raise UsageError(f"the range of {name} must be low <= high within the fitter's bounds "
                             f"({floor} to {p.high:g}), got ({low:g}, {high:g})")
        out[name] = (low, high)
    return out


# -- drawing simulated participants ------------------------------------------------------------
@dataclass(frozen=True)
class _Drawer:
    """Draws the :class:`ParticipantSpec` of one simulated participant of one generating model."""

    model: str
    leaky: bool
    bounds: Mapping[str, tuple[float, float]]
    rows: pd.DataFrame | None  # converged fits to resample, or None: uniform ranges

    def draw(self, rng: np.random.Generator) -> ParticipantSpec:
        """Return a spec whose draw gives this participant's parameters."""
        if self.rows is None:
            values = self.bounds
        else:
            row = self.rows.iloc[int(rng.integers(len(self.rows)))]
            values = {name: (float(row[name]),) * 2 for name in self.bounds
                      if name != "leak" or self.leaky}
        leak = values["leak"] if self.leaky else (0.0, 0.0)
        return ParticipantSpec(self.model, inv_temp=values["inv_temp"], lapse=values["lapse"], leak=leak)


_LEAK_FLOOR = 1e-6  # a leaky model fitted with leak 0 is simulated with this leak (ParticipantSpec needs > 0)


def _drawer(task: Task, spec: ModelSpec, bounds: Mapping[str, tuple[float, float]],
            fits: pd.DataFrame | None, notes: list[str]) -> _Drawer:
    """Return the drawer of generating model ``spec``: from its converged fits when given, else ranges."""
    leaky = "leak" in spec.free
    if fits is None:
        return _Drawer(spec.model_id, leaky, bounds, None)
    table = _check_fits(fits, leaky)
    rows = table[(table["model"] == spec.model_id) & table["converged"]]
    if rows.empty:
        notes.append(f"no converged fits of {spec.model_id} in the fits table: its participants "
                     "are drawn uniformly from the ranges")
        return _Drawer(spec.model_id, leaky, bounds, None)
    rows = rows.reset_index(drop=True)
    if leaky:
        at_zero = int((rows["leak"] < _LEAK_FLOOR).sum())
        if at_zero:
            notes.append(f"{at_zero} fits of {spec.model_id} have leak 0 (the model without "
                         f"leak): simulated with leak {_LEAK_FLOOR:g}")
            rows["leak"] = rows["leak"].clip(lower=_LEAK_FLOOR)
    if "alpha" in rows.columns and (rows["alpha"].dropna() != PARAMS["alpha"].start).any():
        notes.append(f"the fits of {spec.model_id} have alpha other than {PARAMS['alpha'].start:g}: "
                     f"recovery simulates and fits with alpha {PARAMS['alpha'].start:g}")
    notes.append(f"{spec.model_id}: parameters resampled from {len(rows)} converged fits")
    return _Drawer(spec.model_id, leaky, bounds, rows)


def _check_fits(fits: pd.DataFrame, leaky: bool) -> pd.DataFrame:
    """Return the fits table with normalised model ids and a boolean converged column; raise InputError."""
    need = ["participant", "model", "inv_temp", "lapse", "converged"] + (["leak"] if leaky else [])
    missing = [c for c in need if c not in fits.columns]
    if missing:
        raise InputError([Problem(f"the fits table lacks the column {c!r}", column=c) for c in missing])
    out = fits.copy()
    out["model"] = out["model"].map(normalise_model_id)
    text = out["converged"].astype("string").str.strip().str.lower()
    out["converged"] = text.isin(["true", "1", "yes"])
    problems = []
    for name in ["inv_temp", "lapse"] + (["leak"] if leaky else []):
        values = pd.to_numeric(out[name], errors="coerce")
        bad = out["converged"] & ~values.map(lambda v: PARAMS[name].contains(float(v)))
        problems += [Problem(f"{name} must be a number in {PARAMS[name].interval()}, got {out[name].iloc[i]!r}",
                             line=int(i) + 2, column=name) for i in np.flatnonzero(bad.to_numpy())]
        out[name] = values
    if problems:
        raise InputError(problems)
    return out


# -- one cell: simulate, fit, credit -------------------------------------------------------------
@dataclass(frozen=True)
class _Cell:
    credit: pd.DataFrame  # trials, generating_model, participant, fitted_model, credit
    params: pd.DataFrame
    groups: pd.DataFrame
    notes: tuple[str, ...]


def _simulate(task: Task, drawer: _Drawer, n_participants: int, n_trials: int,
              seed: np.random.SeedSequence) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Return (log, truth) of one cell's simulated participants: one session each."""
    width = max(2, len(str(n_participants)))
    logs, truth = [], []
    for k, stream in enumerate(seed.spawn(n_participants), start=1):
        rng = np.random.default_rng(stream)
        spec = drawer.draw(rng)
        learner, values = spec.draw(task, rng)
        session = simulate_participant(task, learner, values["inv_temp"], values["lapse"], n_trials,
                                       rng, rt=spec.rt, miss_rate=spec.miss_rate,
                                       block_length=task.block_length)
        pid = f"p{k:0{width}d}"
        session.insert(0, "participant", pid)
        logs.append(session)
        truth.append({"participant": pid, **values})
    return pd.concat(logs, ignore_index=True), pd.DataFrame(truth)


def _run_cell(task: Task, plan: _Plan, label: str, drawer: _Drawer, n_participants: int,
              n_trials: int, sim_seq: np.random.SeedSequence, fit_seq: np.random.SeedSequence,
              group_seq: np.random.SeedSequence, n_jobs: int) -> _Cell:
    """Return the credit, parameters and group check of the participants generated by ``label``."""
    log, truth = _simulate(task, drawer, n_participants, n_trials, sim_seq)
    validated = validate_log(log, task, source=f"<{label} simulated at {n_trials} trials>")
    tables = fit_participants(validated, task, [plan.specs[g] for g in plan.labels],
                              seed=int(fit_seq.generate_state(1)[0]), n_jobs=n_jobs, cv=False,
                              per_block=False, progress=False)
    fits = tables.fits.assign(fitted_model=tables.fits["model"].map(plan.label_of()),
                              converged=tables.fits["converged"].astype(bool))
    credit, notes = _credit(fits, n_trials, label)
    if len(tables.excluded):
        notes.append(f"{label} at {n_trials} trials: {len(tables.excluded)} participants had no "
                     "scored guess and were not fitted")
    own = fits[fits["fitted_model"] == label].set_index("participant")
    names = list(plan.specs[label].free)
    params = truth.melt(id_vars="participant", value_vars=names, var_name="parameter", value_name="true")
    params["fitted"] = [own.at[p, n] for p, n in zip(params["participant"], params["parameter"])]
    params["converged"] = params["participant"].map(own["converged"]).astype(bool)
    params.insert(0, "model", label)
    params.insert(0, "trials", n_trials)
    groups = _group_check(fits, plan.labels, n_trials, label, np.random.default_rng(group_seq))
    return _Cell(credit, params, groups, tuple(notes))


def _credit(fits: pd.DataFrame, n_trials: int, label: str) -> tuple[pd.DataFrame, list[str]]:
    """Return one row per participant x winning model with its share of the credit (ties split)."""
    usable = fits[fits["converged"] & np.isfinite(fits["bic"].astype(float))]
    best = usable.groupby("participant")["bic"].transform("min")
    won = usable[usable["bic"] - best < TIE_BIC]
    share = 1.0 / won.groupby("participant")["fitted_model"].transform("size")
    credit = pd.DataFrame({"trials": n_trials, "generating_model": label,
                           "participant": won["participant"].to_numpy(),
                           "fitted_model": won["fitted_model"].to_numpy(), "credit": share.to_numpy()})
    notes = []
    failed = fits.loc[~fits["converged"], ["participant", "fitted_model"]]
    if len(failed):
        notes.append(f"{label} at {n_trials} trials: {len(failed)} of {len(fits)} fits did not converge "
                     f"({failed['participant'].nunique()} participants) and were left out of the "
                     "confusion matrix, as the analysis leaves them out of the winners")
    return credit, notes


def _group_check(fits: pd.DataFrame, labels: Sequence[str], n_trials: int, label: str,
                 rng: np.random.Generator) -> pd.DataFrame:
    """Return the share of groups (whole cell and resamples) in which each model has the top pxp."""
    wide = fits.assign(log_evidence=np.where(fits["converged"], -0.5 * fits["bic"], np.nan)) \
        .pivot(index="participant", columns="fitted_model", values="log_evidence") \
        .reindex(columns=list(labels)).dropna()
    lme = wide.to_numpy()
    share = np.zeros(len(labels))
    n_groups = 0
    if len(lme):
        picks = [np.arange(len(lme))] + [rng.integers(len(lme), size=len(lme))
                                         for _ in range(GROUP_RESAMPLES)]
        for rows in picks:
            pxp = rfx_bms(lme[rows]).protected_exceedance
            top = np.abs(pxp - pxp.max()) < 1e-12
            share += top / top.sum()
        n_groups = len(picks)
        share /= n_groups
    return pd.DataFrame({"trials": n_trials, "generating_model": label, "fitted_model": list(labels),
                         "share": share if n_groups else np.nan, "n_groups": n_groups,
                         "group_size": len(lme)})


# -- tables --------------------------------------------------------------------------------------
def clopper_pearson(k: np.ndarray, n: np.ndarray, level: float = CI_LEVEL) -> tuple[np.ndarray, np.ndarray]:
    """Return the exact (Clopper-Pearson) interval for k successes in n trials.

    low = Beta quantile a/2 of Beta(k, n - k + 1) (0 when k = 0), high = quantile
    1 - a/2 of Beta(k + 1, n - k) (1 when k = n), a = 1 - level (Clopper &
    Pearson, 1934). NaN where n = 0.
    """
    k, n = np.asarray(k, dtype=float), np.asarray(n, dtype=float)
    a = 1.0 - level
    with np.errstate(invalid="ignore", divide="ignore"):
        low = np.where(k > 0, stats.beta.ppf(a / 2, np.maximum(k, 1e-300), n - k + 1), 0.0)
        high = np.where(k < n, stats.beta.ppf(1 - a / 2, k + 1, np.maximum(n - k, 1e-300)), 1.0)
    empty = n <= 0
    return np.where(empty, np.nan, low), np.where(empty, np.nan, high)


def _confusion(credit: pd.DataFrame, trials: Sequence[int], labels: Sequence[str]) -> pd.DataFrame:
    """Return the confusion table: every trials x generating x fitted model, fractions and intervals."""
    keys = ["trials", "generating_model"]
    counts = credit.groupby([*keys, "fitted_model"])["credit"].sum()
    grid = pd.MultiIndex.from_product([trials, labels, labels], names=[*keys, "fitted_model"])
    table = counts.reindex(grid, fill_value=0.0).rename("credit").reset_index()
    table["n"] = table.groupby(keys)["credit"].transform("sum").round().astype(int)
    table["fraction"] = table["credit"] / table["n"]
    table["ci_low"], table["ci_high"] = clopper_pearson(table["credit"].round(), table["n"])
    order = {g: i for i, g in enumerate(labels)}
    table = table.sort_values(["trials", "generating_model", "fitted_model"],
                              key=lambda c: c.map(order) if c.name != "trials" else c, kind="stable")
    return table[["trials", "generating_model", "fitted_model", "fraction", "ci_low", "ci_high", "n"]] \
        .reset_index(drop=True)


def _inversion(confusion: pd.DataFrame) -> pd.DataFrame:
    """Return P(generating | fitted) under a uniform prior over generating models (Bayes' rule)."""
    table = confusion.copy()
    table["credited"] = table["fraction"] * table["n"]
    total = table.groupby(["trials", "fitted_model"])["fraction"].transform("sum")
    table["fraction"] = (table["fraction"] / total).where(total > 0)
    table["n"] = table.groupby(["trials", "fitted_model"])["credited"].transform("sum")
    table = table.sort_values(["trials", "fitted_model"], kind="stable")
    return table[["trials", "fitted_model", "generating_model", "fraction", "n"]].reset_index(drop=True)


def _summary(params: pd.DataFrame, notes: list[str]) -> pd.DataFrame:
    """Return Spearman's rho, bias and RMSE of fitted against true values per trials x model x parameter."""
    rows = []
    for (trials, model, name), part in params.groupby(["trials", "model", "parameter"], sort=False):
        ok = part[part["converged"] & part["fitted"].notna()]
        true, fitted = ok["true"].to_numpy(float), ok["fitted"].to_numpy(float)
        varies = len(ok) >= 3 and np.ptp(true) > 0 and np.ptp(fitted) > 0
        rho = float(stats.spearmanr(true, fitted).statistic) if varies else math.nan
        if not varies:
            notes.append(f"{name} of {model} at {trials} trials: Spearman's rho undefined "
                         "(fewer than 3 converged fits, or true or fitted values constant)")
        err = fitted - true
        rows.append({"trials": trials, "model": model, "parameter": name, "spearman": rho,
                     "bias": float(err.mean()) if len(err) else math.nan,
                     "rmse": float(np.sqrt((err ** 2).mean())) if len(err) else math.nan,
                     "n": len(ok)})
    return pd.DataFrame(rows, columns=["trials", "model", "parameter", "spearman", "bias", "rmse", "n"])


def _answer(confusion: pd.DataFrame, summary: pd.DataFrame, n_participants: int) -> str:
    """Return the plain-words answer: the smallest trial count passing both thresholds, or the worst confusion."""
    diagonal = confusion[confusion["generating_model"] == confusion["fitted_model"]]
    head = (f"Design check on {n_participants} simulated participants per model and trial count "
            f"(thresholds chosen for this check, not a published standard: every model recovered "
            f"in at least {TARGET_DIAGONAL:.0%} of its participants, every parameter's Spearman "
            f"rho at least {TARGET_SPEARMAN:g}). ")
    for trials in sorted(confusion["trials"].unique()):
        diag = diagonal[diagonal["trials"] == trials]
        rho = summary.loc[summary["trials"] == trials, "spearman"]
        if (diag["fraction"] >= TARGET_DIAGONAL).all() and rho.notna().all() \
                and (rho >= TARGET_SPEARMAN).all():
            worst = diag.loc[diag["fraction"].idxmin()]
            return (head + f"{trials} trials per participant is the smallest listed count that meets "
                    f"both; its least recovered model is {worst['generating_model']} "
                    f"({worst['fraction']:.0%}, {CI_LEVEL:.0%} CI {worst['ci_low']:.0%}-{worst['ci_high']:.0%}), "
                    f"its lowest rho {rho.min():.2f}. This holds only if participants behave like "
                    "these models with parameters in the simulated ranges.")
    largest = confusion["trials"].max()
    off = confusion[(confusion["trials"] == largest)
                    & (confusion["generating_model"] != confusion["fitted_model"])]
    text = head + "No listed trial count meets both."
    models_ok = [t for t, d in diagonal.groupby("trials") if (d["fraction"] >= TARGET_DIAGONAL).all()]
    if models_ok:
        text += (f" The models alone are recovered from {min(models_ok)} trials per participant; "
                 "the parameters fall short.")
    pair = off.loc[off["fraction"].idxmax()] if len(off) else None
    if pair is not None and pair["fraction"] > 0:
        text += (f" At {largest} trials the most frequent confusion is {pair['generating_model']} "
                 f"participants best fitted by {pair['fitted_model']} ({pair['fraction']:.0%}, "
                 f"{CI_LEVEL:.0%} CI {pair['ci_low']:.0%}-{pair['ci_high']:.0%}).")
    else:
        text += f" At {largest} trials no simulated participant was best fitted by another model."
    low = summary[(summary["trials"] == largest) & ~(summary["spearman"] >= TARGET_SPEARMAN)]
    if len(low):
        text += " Parameters below the rho threshold there: " + ", ".join(
            f"{r.parameter} of {r.model} ({'undefined' if math.isnan(r.spearman) else f'{r.spearman:.2f}'})"
            for r in low.itertuples()) + "."
    return text
