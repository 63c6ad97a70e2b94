"""The report's run details and its methods paragraph: what was done, the formula, and the source."""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass

from foretell.report.layout import Source


def run_lines(manifest: Mapping[str, object]) -> tuple[str, ...]:
    """Return the run's details for the top of the report: version, command, task, seed, posterior draws.

    Parameters
    ----------
    manifest : mapping
        A result folder's manifest, or ``{"settings": ...}`` of an analysis in memory.

    Returns
    -------
    tuple of str
    """
    lines = []
    if "foretell_version" in manifest:
        lines.append(f"foretell {manifest['foretell_version']}")
    if "command" in manifest:
        lines.append(f"command: {manifest['command']}")
    if manifest.get("demo"):
        lines.append("demo data: an invented study")
    settings = manifest.get("settings")
    settings = settings if isinstance(settings, dict) else {}
    if "task" in settings:
        lines.append(f"task: {settings['task']}")
    if "seed" in settings:
        lines.append(f"seed: {settings['seed']}")
    draws = manifest.get("draws", settings.get("draws"))
    if draws is not None:
        lines.append(f"posterior draws per chain: {draws}")
    return tuple(lines)


@dataclass(frozen=True)
class Method:
    """One entry of the methods paragraph: what was done, its formula, and the source."""

    name: str
    text: str
    source: str


def methods(source: Source) -> tuple[Method, ...]:
    """Return the methods used by the steps present, with formulas and citations.

    Parameters
    ----------
    source : Source
        The analysis; only the steps it holds are described.

    Returns
    -------
    tuple of Method
    """
    out = []
    if source.has("fit"):
        out += [
            Method("Choice rule", "P(guess = a) = (1 − lapse) · softmax(inv_temp · log p)_a + lapse / m, "
                   "with p the learner's prediction over the m symbols.", "softmax with lapse, common practice"),
            Method("Counting learners", "p(a | context) = (n_a + α) / (n + mα) from Dirichlet(α) counts of what "
                   "followed the last k symbols; α = 1/2 is the Krichevsky–Trofimov estimator; leaky counting "
                   "multiplies all counts by (1 − leak) each trial.", "Krichevsky & Trofimov (1981)"),
            Method("Context-tree mixture", "the exact Bayesian mixture over all context trees of bounded depth, "
                   "by context-tree weighting; the same machinery gives the response trees.",
                   "Willems, Shtarkov & Tjalkens (1995)"),
            Method("BIC", "BIC = k ln n − 2 ln L̂, n the scored trials; log evidence ≈ −BIC/2.", "Schwarz (1978)"),
            Method("Evidence grades", "2 × log-evidence difference below 2: bare mention; 2–6 positive; "
                   "6–10 strong; above 10 very strong.", "Kass & Raftery (1995)"),
            Method("Random-effects model selection", "model frequencies r ~ Dirichlet, each participant's model "
                   "drawn from r; expected frequencies and exceedance probabilities by variational Bayes.",
                   "Stephan et al. (2009)"),
            Method("Protected exceedance and omnibus risk", "exceedance weighted by 1 − BOR, BOR the posterior "
                   "probability that all models are equally frequent.", "Rigoux et al. (2014)"),
            Method("Model families", "family evidence sums its members' evidence under a uniform prior over "
                   "members; frequencies by Gibbs sampling.", "Penny et al. (2010)"),
            Method("Posterior predictive check", "a response-tree status is beyond the winning model when it "
                   "occurs in fewer than 5% of guess sequences simulated from that model.",
                   "Gelman, Meng & Stern (1996)"),
        ]
    if source.has("rt"):
        out += [
            Method("RT regressions", "log RT = b0 + b · entropy (or surprise) + c · block, by OLS with "
                   "heteroscedasticity- and autocorrelation-consistent errors.", "Newey & West (1987)"),
            Method("Bayesian RT comparison", "hierarchical models compared by expected log predictive density "
                   "estimated with Pareto-smoothed importance sampling leave-one-out; units with Pareto "
                   "k above 0.7 left out and the model refitted without them (exact leave-one-out).",
                   "Vehtari, Gelman & Gabry (2017)"),
        ]
    if source.has("groups"):
        out += [
            Method("Hierarchical group models", "group × block cell means with participant random effects; "
                   "centred or non-centred parameterisation by the strength of the data.",
                   "Betancourt & Girolami (2015)"),
            Method("Multiple comparisons", "permutation p-values corrected step-down across blocks and "
                   "contrasts.", "Holm (1979)"),
        ]
    if source.has("rt") or source.has("groups"):
        out.append(Method("Diagnostics gate", "rank-normalised R-hat ≤ 1.01, bulk ESS ≥ 100 per chain, no "
                          "divergences; otherwise a comparison is not called.", "common practice"))
    if source.has("recovery"):
        out.append(Method("Design check intervals", "exact binomial intervals of the recovery fractions.",
                          "Clopper & Pearson (1934)"))
    return tuple(out)
