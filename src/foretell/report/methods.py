"""The report's provenance line and its methods paragraph, written from the run's settings and tables."""

from __future__ import annotations

import datetime as dt
from collections.abc import Mapping

from foretell.labels import ALL
from foretell.measure import BASELINE_WORDS
from foretell.params import PARAMS
from foretell.report.layout import MemorySource, Source, step_settings
from foretell.text import plural

REFERENCES = {
    "KT": "Krichevsky, R. E. & Trofimov, V. K. (1981). The performance of universal encoding. IEEE Transactions "
          "on Information Theory, 27(2), 199–207.",
    "CTW": "Willems, F. M. J., Shtarkov, Y. M. & Tjalkens, T. J. (1995). The context-tree weighting method: "
           "basic properties. IEEE Transactions on Information Theory, 41(3), 653–664.",
    "BIC": "Schwarz, G. (1978). Estimating the dimension of a model. The Annals of Statistics, 6(2), 461–464.",
    "KR": "Kass, R. E. & Raftery, A. E. (1995). Bayes factors. Journal of the American Statistical Association, "
          "90(430), 773–795.",
    "BMS": "Stephan, K. E., Penny, W. D., Daunizeau, J., Moran, R. J. & Friston, K. J. (2009). Bayesian model "
           "selection for group studies. NeuroImage, 46(4), 1004–1017.",
    "PXP": "Rigoux, L., Stephan, K. E., Friston, K. J. & Daunizeau, J. (2014). Bayesian model selection for "
           "group studies – revisited. NeuroImage, 84, 971–985.",
    "FAM": "Penny, W. D., Stephan, K. E., Daunizeau, J., Rosa, M. J., Friston, K. J., Schofield, T. M. & Leff, "
           "A. P. (2010). Comparing families of dynamic causal models. PLoS Computational Biology, 6(3), e1000709.",
    "PPC": "Gelman, A., Meng, X.-L. & Stern, H. (1996). Posterior predictive assessment of model fitness via "
           "realized discrepancies. Statistica Sinica, 6(4), 733–807.",
    "HAC": "Newey, W. K. & West, K. D. (1987). A simple, positive semi-definite, heteroskedasticity and "
           "autocorrelation consistent covariance matrix. Econometrica, 55(3), 703–708.",
    "ANDREWS": "Andrews, D. W. K. (1991). Heteroskedasticity and autocorrelation consistent covariance matrix "
               "estimation. Econometrica, 59(3), 817–858.",
    "PW": "Prais, S. J. & Winsten, C. B. (1954). Trend estimators and serial correlation. Cowles Commission "
          "Discussion Paper No. 383.",
    "SATT": "Satterthwaite, F. E. (1946). An approximate distribution of estimates of variance components. "
            "Biometrics Bulletin, 2(6), 110–114.",
    "PRACTICE": "Newell, A. & Rosenbloom, P. S. (1981). Mechanisms of skill acquisition and the law of practice. "
                "In J. R. Anderson (Ed.), Cognitive Skills and Their Acquisition (pp. 1–55). Erlbaum.",
    "PES": "Rabbitt, P. M. A. (1966). Errors and error correction in choice-response tasks. Journal of "
           "Experimental Psychology, 71(2), 264–272.",
    "MBB": "Künsch, H. R. (1989). The jackknife and the bootstrap for general stationary observations. The "
           "Annals of Statistics, 17(3), 1217–1241.",
    "ELPDSE": "Sivula, T., Magnusson, M. & Vehtari, A. (2020). Uncertainty in Bayesian leave-one-out "
              "cross-validation based model comparison. arXiv:2008.10296.",
    "LOO": "Vehtari, A., Gelman, A. & Gabry, J. (2017). Practical Bayesian model evaluation using leave-one-out "
           "cross-validation and WAIC. Statistics and Computing, 27(5), 1413–1432.",
    "RHAT": "Vehtari, A., Gelman, A., Simpson, D., Carpenter, B. & Bürkner, P.-C. (2021). Rank-normalization, "
            "folding, and localization: an improved R-hat for assessing convergence of MCMC. Bayesian Analysis, "
            "16(2), 667–718.",
    "NUTS": "Hoffman, M. D. & Gelman, A. (2014). The No-U-Turn sampler: adaptively setting path lengths in "
            "Hamiltonian Monte Carlo. Journal of Machine Learning Research, 15, 1593–1623.",
    "HOLM": "Holm, S. (1979). A simple sequentially rejective multiple test procedure. Scandinavian Journal of "
            "Statistics, 6(2), 65–70.",
    "CP": "Clopper, C. J. & Pearson, E. S. (1934). The use of confidence or fiducial limits illustrated in the "
          "case of the binomial. Biometrika, 26(4), 404–413.",
    "CLUSTER": "Maris, E. & Oostenveld, R. (2007). Nonparametric statistical testing of EEG- and MEG-data. "
               "Journal of Neuroscience Methods, 164(1), 177–190.",
}
"""Full references of the methods paragraph, by key (recalled from memory; authors, year, title, journal)."""


def provenance(source: Source) -> dict[str, object]:
    """Return the run's provenance for the top of the report.

    Parameters
    ----------
    source : Source
        A result folder (its manifest: version, command, packages; the date
        of ``manifest.json``) or an analysis in memory (this foretell's
        version and packages, today's date, the command when its settings
        record one).

    Returns
    -------
    dict
        ``version``, ``date`` (ISO, UTC), ``command`` (or None), ``demo``
        (the command was ``demo``), ``task``, ``seed``, ``participants`` and
        ``trials`` (from the validation summary, None without it),
        ``python`` and ``packages``.
    """
    from foretell import __version__
    from foretell.outputs import provenance as record

    manifest = source.manifest
    settings = manifest.get("settings") if isinstance(manifest.get("settings"), dict) else {}
    if isinstance(source, MemorySource):
        known, when = record(str(settings.get("command", "")), {}, []), dt.datetime.now(dt.timezone.utc)
    else:
        known = manifest
        stamp = source.path / "manifest.json" if hasattr(source, "path") else None
        when = (dt.datetime.fromtimestamp(stamp.stat().st_mtime, dt.timezone.utc)
                if stamp is not None and stamp.is_file() else None)
    command = known.get("command") or settings.get("command") or None
    summary = source.table("validation/summary")
    everyone = summary[summary["participant"] == ALL] if summary is not None else None
    return {"version": known.get("foretell_version", __version__), "date": when.date().isoformat() if when else None,
            "command": command, "demo": command == "demo", "task": settings.get("task"),
            "seed": settings.get("seed"), "participants": None if summary is None else len(summary) - len(everyone),
            "trials": int(everyone["trials"].iloc[0]) if everyone is not None and len(everyone) else None,
            "python": known.get("python"), "packages": dict(known.get("packages") or {})}


def run_lines(run: Mapping[str, object]) -> tuple[str, ...]:
    """Return the provenance line's parts: version, date, command, participants and trials, task, seed.

    Parameters
    ----------
    run : mapping
        :func:`provenance`.

    Returns
    -------
    tuple of str
    """
    lines = [f"foretell {run['version']}"]
    if run["date"]:
        lines.append(f"run {run['date']}")
    if run["command"]:
        lines.append(f"command: foretell {run['command']}")
    if run["participants"] is not None:
        lines.append(plural(int(run["participants"]), "participant")
                     + (f", {int(run['trials']):,} trials" if run["trials"] is not None else ""))
    if run["task"]:
        lines.append(f"task {run['task']}")
    if run["seed"] is not None:
        lines.append(f"seed {run['seed']}")
    return tuple(lines)


def _gate(gate: Mapping[str, object]) -> str:
    """Return the diagnostics gate in full, from the options a step recorded."""
    return (f"rank-normalised R-hat at most {gate.get('rhat_max', 1.01)}, bulk effective sample size at least "
            f"{float(gate.get('ess_bulk_per_chain', 100)):g} per chain, at most "
            f"{plural(int(gate.get('max_divergences', 0)), 'divergent transition')} and every Pareto k at most "
            f"{gate.get('pareto_k_max', 0.7)} (Vehtari et al., 2021; Vehtari, Gelman & Gabry, 2017); a model "
            f"failing any of these is not called, and a run with fewer than {gate.get('full_chains', 4)} chains "
            f"of {gate.get('full_draws', 1000)} draws is provisional")


def _fit_sentences(source: Source, fit: Mapping[str, object]) -> tuple[list[str], list[str]]:
    """Return the sentences on the model fits and comparisons, and the references they cite."""
    models = list(fit.get("models") or [])
    fits = source.table("fit/fits")
    warmup = int(fits["depth"].max()) if fits is not None and "depth" in fits.columns and len(fits) else None
    bounds = ", ".join(f"{name} [{PARAMS[name].low:g}, {PARAMS[name].high:g}]"
                       for name in ("inv_temp", "lapse", *fit.get("free", [])) if name in PARAMS)
    text = [f"Each participant's guesses were fitted by maximum likelihood with {plural(len(models), 'learner model')} "
            f"({', '.join(models)}): counting learners with Dirichlet(½) counts after the last k symbols "
            "(Krichevsky & Trofimov, 1981) and the context-tree mixture (Willems, Shtarkov & Tjalkens, 1995), "
            "each read out by a softmax of its log predictions with an inverse temperature and a lapse rate "
            f"(bounds {bounds}; {plural(int(fit.get('n_starts', 1)), 'start')} per fit)."]
    if warmup is not None:
        text.append(f"The first {plural(warmup, 'trial')} of each session (the largest context depth compared) "
                    "were warm-up, unscored for every model.")
    criterion = "BIC (Schwarz, 1978)" if fit.get("criterion", "bic") == "bic" else \
        "cross-validated log-likelihood (leave one block out)"
    text.append(f"Models and model families were compared per group on whole-session {criterion}, by "
                "random-effects Bayesian model selection (Stephan et al., 2009; families: Penny et al., 2010); "
                "a model is named "
                "only when the omnibus risk is at most 0.5 and its protected exceedance at least max(1/K + 0.1, 0.5), "
                "and a clear winner from 0.95 (Rigoux et al., 2014; common practice). A participant's own lead is "
                "graded after Kass & Raftery (1995); response trees are checked against "
                f"{plural(int(fit.get('n_replicates', 20)), 'replicate')} simulated from the winning model "
                "(Gelman, Meng & Stern, 1996).")
    return text, ["KT", "CTW", "BIC", "BMS", "FAM", "PXP", "KR", "PPC"]


def _groups_sentences(groups: Mapping[str, object]) -> tuple[list[str], list[str]]:
    """Return the sentences on the group comparison, and the references they cite."""
    text = [f"Groups were compared per block and over all blocks by permutation tests over participants "
            f"({int(groups.get('n_permutations', 0)):,} permutations), Holm-corrected across blocks and "
            "contrasts (Holm, 1979; differences counted at corrected p < 0.05)."]
    cites = ["HOLM"]
    if groups.get("bayes"):
        text.append(f"Hierarchical group models were sampled with NUTS (Hoffman & Gelman, 2014; "
                    f"{groups.get('chains')} chains × {groups.get('draws')} draws after {groups.get('tune')} "
                    f"tuning steps) and used only when they passed the diagnostics gate: "
                    f"{_gate(groups.get('gate') or {})}.")
        cites += ["NUTS", "RHAT", "LOO"]
    return text, cites


def _rt_sentences(rt: Mapping[str, object]) -> tuple[list[str], list[str]]:
    """Return the sentences on the measure (reaction times), and the references they cite."""
    regressors = " and ".join(rt.get("regressors") or ["entropy"])
    terms = ", ".join(BASELINE_WORDS.get(t, t) for t in rt.get("baseline") or []) or "an intercept alone"
    text = [f"The measure ({rt.get('measure', 'rt')}{', log-transformed' if rt.get('log_transform') else ''}) "
            f"was regressed per participant on each learner's {regressors} beside a time-on-task baseline "
            f"({terms}; the power law of practice, Newell & Rosenbloom, 1981; post-error slowing, Rabbitt, 1966), "
            "with AR(1) errors by two-step feasible GLS (Prais & Winsten, 1954); slope intervals used "
            "Newey–West errors (Newey & West, 1987) at Andrews' (1991) data-driven lag with Student's t at "
            "Satterthwaite's (1946) degrees of freedom, or, for a leak chosen on held-out blocks, a moving-block "
            "bootstrap that repeated the choice (Künsch, 1989). Every learner and the baseline alone (model "
            "none) were compared by random-effects selection of per-participant BIC (Stephan et al., 2009; "
            "Rigoux et al., 2014); a learner was called only when the omnibus risk was at most 0.5 and its "
            "protected exceedance at least max(1/K + 0.1, 0.5), K the models compared, with the baseline among "
            "them."]
    cites = ["PRACTICE", "PES", "PW", "HAC", "ANDREWS", "SATT", "MBB", "BMS", "PXP"]
    if rt.get("bayes"):
        which = ("every learner" if rt.get("hierarchical_models") == "all" else
                 "the learners the random-effects selection left in play")
        text.append(f"Hierarchical models of {which} and of the baseline ({rt.get('chains')} chains × "
                    f"{rt.get('draws')} draws after {rt.get('tune')} tuning steps, NUTS; Hoffman & Gelman, 2014) "
                    f"estimated population slopes, used only when they passed the diagnostics gate: "
                    f"{_gate(rt.get('gate') or {})}.")
        cites += ["NUTS", "RHAT"]
    if rt.get("bayes") and rt.get("loo"):
        text.append(f"They were ranked by PSIS-LOO over participant × block units, with up to {rt.get('refits')} "
                    "exact refits for units with high Pareto k (Vehtari, Gelman & Gabry, 2017); a ranking was "
                    "called only when the first model's ELPD exceeded every other's by more than 4 and 2 standard "
                    "errors, computed over participants (Sivula, Magnusson & Vehtari, 2020).")
        cites += ["LOO", "ELPDSE"]
    return text, cites


def methods(source: Source, run: Mapping[str, object]) -> tuple[tuple[str, ...], tuple[str, ...]]:
    """Return the methods paragraphs of this run, with its numbers, and their full references.

    Parameters
    ----------
    source : Source
        The analysis; only the steps it holds are described, with the
        options they recorded (models, bounds, starts, warm-up,
        permutations, draws, the diagnostics gate).
    run : mapping
        :func:`provenance` (participants, trials, task, seed, versions).

    Returns
    -------
    paragraphs : tuple of str
        A text a researcher can adapt, one paragraph per step, then seeds and versions.
    references : tuple of str
        The full references cited (:data:`REFERENCES`), in order of first citation.
    """
    who = (f"{plural(int(run['participants']), 'participant')} ({int(run['trials']):,} trials)"
           if run.get("participants") is not None and run.get("trials") is not None else "the participants")
    paragraphs = [f"Data: {who} on task {run.get('task') or 'of the run'}; trials with missed guesses were "
                  "not scored, and reaction times were screened (too fast, too slow, and outliers by median "
                  "absolute deviation when that rule was on; the validation section states the screen) for the "
                  "reaction-time analyses only."]
    parts = []
    if source.has("fit"):
        parts.append(_fit_sentences(source, step_settings(source, "fit")))
    if source.has("groups"):
        parts.append(_groups_sentences(step_settings(source, "groups")))
    if source.has("rt"):
        parts.append(_rt_sentences(step_settings(source, "rt")))
    cites: list[str] = []
    for text, keys in parts:
        paragraphs.append(" ".join(text))
        cites += keys
    if source.has("eeg"):
        paragraphs.append("EEG: each learner's regressors were scored by leave-one-block-out likelihood of the "
                          "single-trial response and compared by random-effects selection; beta maps were tested "
                          "with cluster permutation tests (Maris & Oostenveld, 2007).")
        cites += ["BMS", "CLUSTER"]
    if source.has("recovery"):
        paragraphs.append("Design check: simulated participants of each model were fitted by every model; "
                          "recovery fractions carry exact binomial intervals (Clopper & Pearson, 1934).")
        cites.append("CP")
    packages = ", ".join(f"{k} {v}" for k, v in sorted(dict(run.get("packages") or {}).items()))
    paragraphs.append(f"Every random stream was derived from seed {run.get('seed')}, keyed by what it is for. "
                      f"Software: foretell {run.get('version')}"
                      + (f", Python {run['python']}" if run.get("python") else "")
                      + (f", {packages}" if packages else "") + ".")
    return tuple(paragraphs), tuple(REFERENCES[k] for k in dict.fromkeys(cites))
