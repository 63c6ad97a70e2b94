"""The HTML report of an analysis folder: tables read back from the folder, figures, methods and cautions.

:func:`build_report` reads the step folders that ``foretell analyze`` writes
(``validation/``, ``fit/``, ``rt/``, ``groups/``, ``events/``, ``recovery/``
and ``manifest.json``); every number in the report comes from those tables.
It returns the page and its figures; the caller writes both. The page is
self-contained: figures are PNGs embedded as ``data:`` URIs, there are no
scripts and no external resources, and a Content-Security-Policy meta tag
forbids loading anything else. Words such as "stands out" or "clear" are
those of :func:`foretell.summaries.verdict` (Rigoux et al., 2014; common
practice); a participant's own win is graded after Kass & Raftery (1995).
"""

from __future__ import annotations

import base64
import json
import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd
from jinja2 import Environment, PackageLoader, select_autoescape
from matplotlib import colormaps
from matplotlib.cm import ScalarMappable
from matplotlib.colors import ListedColormap, Normalize
from matplotlib.figure import Figure
from matplotlib.patches import Patch

from foretell.errors import InputError, Problem, UsageError
from foretell.plots.common import HEATMAP, colour, confusion_heatmap, figure_png, new_figure, text_colour
from foretell.labels import ALL, ROOT
from foretell.summaries import CLEAR_PXP, verdict
from foretell.text import number, plural

STEPS = ("validation", "fit", "rt", "groups", "events", "recovery")
"""The step folders a report reads, in the order of its sections."""

HOLM_ALPHA = 0.05
"""Family-wise level at which a Holm-corrected permutation p is counted as a difference (common practice)."""

STATUS_WORDS = {"distinguished": "distinguished", "merged": "merged into a shorter context",
                "split-deeper": "split into longer contexts", "unvisited": "not visited"}
_STRENGTH_SHORT = {"bare-mention": "bare", "positive": "pos.", "strong": "strong", "very-strong": "v. strong"}
_LABEL_COLUMNS = {c: "string" for c in ("participant", "group", "session", "block", "model", "best_model",
                                        "runner_up", "context", "source_context", "response_leaf", "contrast",
                                        "reference", "metric", "family", "name", "generating_model",
                                        "fitted_model", "note", "reasons", "reason")}


@dataclass(frozen=True)
class Table:
    """A table as shown in the report: a caption, column headings and formatted cells."""

    caption: str
    columns: tuple[str, ...]
    rows: tuple[tuple[str, ...], ...]


@dataclass(frozen=True)
class Section:
    """One section of the report: its id, heading, paragraphs, figures (names) and tables.

    ``missing`` is the one-line reason a section is absent (then nothing else is shown).
    """

    key: str
    heading: str
    paragraphs: tuple[str, ...] = ()
    items: tuple[str, ...] = ()
    figures: tuple[tuple[str, str], ...] = ()
    tables: tuple[Table, ...] = ()
    missing: str | None = None


def build_report(out_dir: str | Path, *, provisional: bool = False,
                 title: str | None = None) -> tuple[str, dict[str, bytes]]:
    """Return (report.html text, {"figures/<name>.png": PNG bytes}) of an analysis folder.

    ``out_dir`` holds the step folders (see the module docstring); a step
    whose folder is absent gets a one-line section saying so. ``provisional``
    (demo runs with fewer posterior draws) says at the top and in every
    Bayesian section that the Bayesian comparisons are provisional.
    """
    out = Path(out_dir)
    if not out.is_dir():
        raise UsageError(f"{out}: not a folder; give the folder an analysis wrote")
    if not any((out / step).is_dir() for step in STEPS):
        raise UsageError(f"{out}: holds none of the step folders {', '.join(STEPS)}")
    folder = _Folder(out)
    figures: dict[str, Figure] = {}
    sections = [
        _data_section(folder),
        _curves_section(folder, figures, provisional),
        _models_section(folder, figures, provisional),
        _trees_section(folder, figures),
        _rt_section(folder, provisional),
        _events_section(folder),
        _design_section(folder, figures),
    ]
    pngs = {f"figures/{name}.png": figure_png(fig) for name, fig in figures.items()}
    images = {name: "data:image/png;base64," + base64.b64encode(data).decode("ascii")
              for name, data in pngs.items()}
    manifest = folder.manifest()
    env = Environment(loader=PackageLoader("foretell.report", "templates"), autoescape=select_autoescape(["j2", "html"]),
                      keep_trailing_newline=True)
    html = env.get_template("report.html.j2").render(
        title=title or "foretell analysis report", provisional=provisional, sections=sections,
        images=images, run=_run_lines(manifest), methods=_methods(folder), missing_steps=[
            s for s in STEPS if not (out / s).is_dir()])
    return html, pngs


# --------------------------------------------------------------------------- reading the folder


class _Folder:
    """Read access to an analysis folder: tables by step/name, texts, the manifest."""

    def __init__(self, root: Path) -> None:
        self.root = root

    def has(self, step: str) -> bool:
        return (self.root / step).is_dir()

    def table(self, name: str) -> pd.DataFrame | None:
        """Return ``<name>.csv`` with label columns as strings, or None when the file is absent."""
        path = self.root / f"{name}.csv"
        if not path.is_file():
            return None
        try:
            head = pd.read_csv(path, nrows=0).columns
            return pd.read_csv(path, dtype={c: t for c, t in _LABEL_COLUMNS.items() if c in head},
                               keep_default_na=False, na_values=[""])
        except (pd.errors.ParserError, UnicodeDecodeError, ValueError) as exc:
            raise InputError([Problem(f"cannot read this table: {exc}", str(path))]) from None

    def text(self, name: str) -> str | None:
        path = self.root / name
        return path.read_text(encoding="utf-8") if path.is_file() else None

    def manifest(self) -> Mapping[str, object]:
        text = self.text("manifest.json")
        if text is None:
            return {}
        try:
            record = json.loads(text)
        except ValueError as exc:
            raise InputError([Problem(f"not valid JSON: {exc}", str(self.root / "manifest.json"))]) from None
        return record if isinstance(record, dict) else {}


def _lines(text: str | None) -> tuple[str, ...]:
    return tuple(line for line in (text or "").splitlines() if line.strip())


def _cell(value: object, spec: str = ".3f") -> str:
    """Return a table cell: labels as they are, numbers with ``spec``, missing values as "n/a"."""
    if value is None or (isinstance(value, float) and math.isnan(value)) or value is pd.NA:
        return "n/a"
    if isinstance(value, (bool, np.bool_)):
        return "yes" if value else "no"
    if isinstance(value, (int, np.integer)):
        return str(int(value))
    if isinstance(value, (float, np.floating)):
        return number(float(value), spec)
    return str(value)


def _table(frame: pd.DataFrame, columns: Mapping[str, str], caption: str,
           formats: Mapping[str, str] | None = None) -> Table:
    """Return the report table of ``frame``'s ``columns`` (name -> heading), cells by :func:`_cell`."""
    formats = formats or {}
    present = [c for c in columns if c in frame.columns]
    rows = tuple(tuple(_cell(v, formats.get(c, ".3f")) for c, v in zip(present, row))
                 for row in frame[present].itertuples(index=False))
    return Table(caption, tuple(columns[c] for c in present), rows)


def _absent(key: str, heading: str, why: str) -> Section:
    return Section(key, heading, missing=why)


# --------------------------------------------------------------------------- sections


def _data_section(folder: _Folder) -> Section:
    heading = "Data and exclusions"
    if not folder.has("validation"):
        return _absent("data", heading, "No validation/ folder: the data summary is not part of this analysis.")
    summary = folder.table("validation/summary")
    paragraphs, tables, items = [], [], []
    if summary is not None:
        people = summary[summary["participant"] != ALL]
        total = summary[summary["participant"] == ALL]
        line = f"The log holds {plural(len(people), 'participant')}"
        if len(total):
            t = total.iloc[0]
            line += (f", {_cell(t['trials'])} trials, of which {_cell(t['missed'])} missed guesses; "
                     f"{_cell(t['rt_usable'])} reaction times pass the screen")
        paragraphs.append(line + ". The RT screen only flags trials for the RT analyses; it removes none.")
        tables.append(_table(summary, {
            "participant": "participant", "group": "group", "sessions": "sessions", "blocks": "blocks",
            "trials": "trials", "missed": "missed guesses", "rt_missing": "RT missing",
            "rt_fast": "RT too fast", "rt_slow": "RT too slow", "rt_mad": "RT outlier (MAD)",
            "rt_usable": "RT usable", "labels_fixed": "labels fixed"},
            "Validation summary, trial counts per participant (last row: everyone)"))
    excluded = folder.table("fit/excluded")
    if excluded is None:
        paragraphs.append("No fit/excluded.csv: exclusions from the model fits are not known here.")
    elif excluded.empty:
        paragraphs.append("No participant was left out of the model fits.")
    else:
        paragraphs.append(f"{plural(len(excluded), 'participant')} left out of the model fits:")
        tables.append(_table(excluded, {"participant": "participant", "group": "group", "reason": "reason"},
                             "Participants left out of the model fits, and why"))
    warnings = _lines(folder.text("validation/warnings.txt"))
    paragraphs.append("Validation noticed:" if warnings else "Validation raised no warning.")
    items.extend(warnings)
    return Section("data", heading, tuple(paragraphs), tuple(items), tables=tuple(tables))


def _provisional_line(provisional: bool) -> tuple[str, ...]:
    return (("Provisional: this run drew fewer posterior samples than a full run, so its Bayesian "
             "comparisons are provisional.",) if provisional else ())


def _curves_section(folder: _Folder, figures: dict[str, Figure], provisional: bool) -> Section:
    heading = "Learning curves by group"
    if not folder.has("groups"):
        return _absent("curves", heading, "No groups/ folder: the log has no groups to compare, "
                                          "or the group step was not run.")
    from foretell.steps.groups import METRICS, context_figure, curve_figure  # imports PyMC: only when needed

    group_curves = folder.table("groups/group_curves")
    diagnostics = folder.table("groups/group_diagnostics")
    bayes = diagnostics is not None and len(diagnostics) > 0
    paragraphs = list(_provisional_line(provisional and bayes))
    shown = []
    if group_curves is not None and len(group_curves):
        for metric in dict.fromkeys(group_curves["metric"]):
            if metric in METRICS:
                figures[f"curve_{metric}"] = curve_figure(group_curves, metric)
                shown.append((f"figures/curve_{metric}.png",
                              f"{METRICS[metric].title} ({METRICS[metric].unit}) by block and group: "
                              f"{METRICS[metric].meaning}."))
    learning = folder.table("groups/context_learning")
    if learning is not None and len(learning):
        figures["context_learning"] = context_figure(learning)
        shown.append(("figures/context_learning.png",
                      "Share of guesses of the most likely next symbol after each source context; the dashed "
                      "line is the source's probability of that symbol."))
    tables = []
    effects = folder.table("groups/group_effects")
    if effects is not None and len(effects):
        holm = effects["perm_p_holm"].astype(float)
        below = int((holm < HOLM_ALPHA).sum())
        paragraphs.append(
            f"Permutation tests of the group difference per block, Holm-corrected across blocks and contrasts "
            f"per metric: {below} of {plural(len(effects), 'difference')} have a corrected p below "
            f"{number(HOLM_ALPHA, '.2f')} (common practice). A difference above that is neither shown to "
            f"exist nor shown to be absent.")
        called = effects["called"].astype("boolean") if "called" in effects.columns else None
        if called is not None and called.notna().any() and not called.fillna(False).all():
            paragraphs.append("Where 'model called' says no, the hierarchical model failed its diagnostics: "
                              "its difference and interval are not called and are not shown.")
        tables.append(_table(effects, {
            "contrast": "contrast", "session": "session", "block": "block", "metric": "metric",
            "scale": "scale", "n_group": "n group", "n_reference": "n reference",
            "observed_diff": "observed difference (participant values)", "perm_p": "permutation p",
            "perm_p_holm": "Holm-corrected p", "diff_mean": "model difference (posterior mean)",
            "hdi_low": "HDI low", "hdi_high": "HDI high", "prob_positive": "P(difference > 0)",
            "called": "model called"}, "Group differences per block (group minus reference)"))
    models = folder.table("groups/group_models")
    if models is not None and len(models):
        tables.append(_table(models, {
            "contrast": "contrast", "level": "level", "name": "model or family",
            "prob_groups_differ": "P(groups differ in frequencies)", "freq_group": "frequency in group",
            "freq_reference": "frequency in reference", "n_group": "n group", "n_reference": "n reference"},
            "Do the groups use the models in different proportions? Whole-session BIC evidence "
            "(Rigoux et al., 2014)"))
    if bayes:
        tables.append(_diagnostics_table(diagnostics, "metric", "Diagnostics of the hierarchical group models"))
    elif effects is not None and len(effects):
        paragraphs.append("No hierarchical group model was run: the differences rest on permutation tests only.")
    return Section("curves", heading, tuple(paragraphs), figures=tuple(shown), tables=tuple(tables))


def _diagnostics_table(table: pd.DataFrame, key: str, caption: str) -> Table:
    return _table(table, {key: key, "sampler": "sampler", "chains": "chains", "draws": "draws per chain",
                          "rhat_max": "largest R-hat", "ess_bulk_min": "smallest bulk ESS",
                          "divergences": "divergences", "pareto_k_max": "largest Pareto k",
                          "loo_refits": "exact LOO refits", "ok": "passed", "provisional": "provisional", "reasons": "why not passed"},
                  caption, {"rhat_max": ".3f", "ess_bulk_min": ".0f", "pareto_k_max": ".2f"})


_SELECTION_COLUMNS = {
    "group": "group", "model": "model", "family": "family", "n_participants": "participants",
    "expected_freq": "expected frequency", "exceedance": "exceedance", "protected_exceedance":
    "protected exceedance", "bor": "omnibus risk (BOR)", "method": "method", "note": "note"}


def _verdicts(table: pd.DataFrame, label: str) -> list[str]:
    return [f"Group {g} ({plural(int(part['n_participants'].iloc[0]), 'participant')}): "
            f"{verdict(part, label)[2]}." for g, part in table.groupby("group", sort=False)]


def _block_verdicts(table: pd.DataFrame, label: str) -> pd.DataFrame:
    """Return per group x session x block: the verdict's leader (or none), top protected exceedance, BOR."""
    rows = []
    for (group, session, block), unit in table.groupby(["group", "session", "block"], sort=False):
        status, leader, words = verdict(unit, label)
        ok = unit.dropna(subset=["protected_exceedance"])
        rows.append({"group": group, "session": session, "block": block,
                     "leader": leader or "none stands out",
                     "top": float(ok["protected_exceedance"].max()) if len(ok) else math.nan,
                     "bor": float(ok["bor"].iloc[0]) if len(ok) else math.nan, "words": words})
    return pd.DataFrame(rows)


def _models_section(folder: _Folder, figures: dict[str, Figure], provisional: bool) -> Section:
    heading = "Model comparison"
    if not folder.has("fit"):
        return _absent("models", heading, "No fit/ folder: no models were fitted.")
    paragraphs = list(_provisional_line(provisional))
    items: list[str] = []
    tables = []
    selection = folder.table("fit/selection")
    if selection is not None and len(selection):
        crit = selection["criterion"].dropna()
        paragraphs.append(
            "Random-effects Bayesian model selection per group on whole-session "
            f"{'BIC' if len(crit) and crit.iloc[0] == 'bic' else 'cross-validated'} evidence. A model is "
            f"named only when it stands out: omnibus risk at most 0.5 and a protected exceedance above "
            f"chance by 0.1 (and at least 0.5); it is a clear winner from a protected exceedance of "
            f"{number(CLEAR_PXP, '.2f')} (common practice).")
        items.extend(_verdicts(selection, "model"))
        tables.append(_table(selection, _SELECTION_COLUMNS, "Model selection per group (whole session)"))
    families = folder.table("fit/families")
    if families is not None and len(families):
        items.extend(f"Families, {line[0].lower()}{line[1:]}" for line in _verdicts(families, "family"))
        tables.append(_table(families, {**_SELECTION_COLUMNS, "models": "models"},
                             "Model families per group (whole session)"))
    blocks = folder.table("fit/selection_blocks")
    if blocks is not None and len(blocks):
        tables.append(_table(_block_verdicts(blocks, "model"), {
            "group": "group", "session": "session", "block": "block", "leader": "model standing out",
            "top": "highest protected exceedance (block)", "bor": "omnibus risk (block)"},
            "Model selection per block (refitted on each block's trials)"))
    winners = folder.table("fit/winners")
    if winners is not None and len(winners):
        figures["winners"] = winners_heatmap(winners)
        graded = winners[(winners["block"] == ALL) & winners["best_model"].notna()]
        paragraphs.append(
            f"Each participant's own best model ({plural(len(graded), 'participant')} with a whole-session "
            "winner), whole session and per block. Cell text: the strength of the lead over the runner-up after "
            "Kass & Raftery (1995); 'bare' is not worth more than a bare mention, so such a cell names no winner.")
        fig_list = (("figures/winners.png", "Best model per participant and block (colour), with the strength of "
                     "its lead over the runner-up (text)."),)
    else:
        fig_list = ()
    summary = _lines(folder.text("fit/summary.txt"))
    items.extend(line for line in summary if line.startswith(("optimiser", "bounds")))
    return Section("models", heading, tuple(paragraphs), tuple(items), fig_list, tuple(tables))


def winners_heatmap(winners: pd.DataFrame) -> Figure:
    """Return the participant x block heatmap of best models (colour) annotated with the Kass-Raftery strength."""
    table = winners.assign(unit=_unit_labels(winners))
    units = list(dict.fromkeys(u for u in table["unit"] if u != "whole session")) + ["whole session"]
    people = list(dict.fromkeys(table["participant"]))
    models = sorted(table["best_model"].dropna().unique())
    code = {m: i for i, m in enumerate(models)}
    grid = np.full((len(people), len(units)), np.nan)
    text = np.full(grid.shape, "n/a", dtype=object)
    for row in table.itertuples(index=False):
        i, j = people.index(row.participant), units.index(row.unit)
        if isinstance(row.best_model, str):
            grid[i, j] = code[row.best_model]
            text[i, j] = _STRENGTH_SHORT.get(str(row.strength), str(row.strength))
    fig, (ax,) = new_figure(width=max(4.5, 0.9 * len(units) + 3.0), height=max(2.8, 0.32 * len(people) + 1.6))
    palette = ListedColormap([colour(i) for i in range(max(len(models), 1))]).with_extremes(bad="0.85")
    ax.imshow(np.ma.masked_invalid(grid), cmap=palette, vmin=-0.5, vmax=max(len(models), 1) - 0.5,
              aspect="auto", interpolation="nearest")
    for (i, j), label in np.ndenumerate(text):
        shade = colour(int(grid[i, j])) if np.isfinite(grid[i, j]) else "#D9D9D9"
        ax.text(j, i, label, ha="center", va="center", fontsize="x-small", color=text_colour(shade))
    ax.set_xticks(range(len(units)), units, rotation=30, ha="right")
    ax.set_yticks(range(len(people)), people)
    ax.set_xlabel("block")
    ax.set_ylabel("participant")
    ax.set_title("Best model per participant and block")
    ax.legend(handles=[Patch(color=colour(code[m]), label=m) for m in models], title="best model",
              fontsize="small", loc="upper left", bbox_to_anchor=(1.02, 1.0))
    return fig


def _unit_labels(table: pd.DataFrame) -> list[str]:
    """Return each row's block label: "whole session" for block all, "session:block" when sessions differ."""
    sessions = set(table.loc[table["block"] != ALL, "session"])
    return ["whole session" if b == ALL else (str(b) if len(sessions) <= 1 else f"{s}:{b}")
            for s, b in zip(table["session"], table["block"])]


def _trees_section(folder: _Folder, figures: dict[str, Figure]) -> Section:
    heading = "Context trees"
    if not folder.has("fit"):
        return _absent("trees", heading, "No fit/ folder: no response trees were computed.")
    agreement = folder.table("fit/context_agreement")
    if agreement is None or agreement.empty:
        return _absent("trees", heading, "No source contexts in fit/context_agreement.csv (the task gives no "
                                         "source, or no response trees were computed).")
    whole = agreement[(agreement["block"] == ALL) & (agreement["session"] == ALL)]
    contexts = list(dict.fromkeys(whole["source_context"]))
    figures["source_tree"] = tree_figure(contexts, {}, title="Source tree (the task's contexts)")
    shares = status_shares(whole, folder.table("fit/contexts"))
    shown = [("figures/source_tree.png", "The task's context tree: the root '*' is no past; each step down "
              "prepends an older symbol. Leaves are the contexts the source distinguishes.")]
    tables = []
    for group, part in shares.groupby("group", sort=False):
        name = f"response_tree_{_slug(group)}"
        figures[name] = tree_figure(contexts, {r.source_context: r for r in part.itertuples(index=False)},
                                    title=f"Typical response tree, group {group}")
        shown.append((f"figures/{name}.png",
                      f"Group {group}: per source context, the share of participants whose response tree "
                      "distinguishes it (D), merges it into a shorter context (M) or splits it into longer ones "
                      "(S); in brackets, the share their winning models produce."))
        tables.append(_table(part, {
            "source_context": "source context", "depth": "depth", "n_participants": "participants",
            "distinguished": "distinguished", "merged": "merged", "split_deeper": "split deeper",
            "unvisited": "unvisited", "model_distinguished": "distinguished by winning models",
            "model_merged": "merged by winning models", "model_split_deeper": "split deeper by winning models",
            "expected_status_share": "winning models' share of the observed status",
            "beyond_model": "beyond the winning model"},
            f"Response trees of group {group} (whole session): shares of participants", {"depth": "d"}))
    paragraphs = (
        "A response tree says which past stimuli the guesses depend on, whatever learner produced them. "
        "Recency alone makes guesses depend on the past, so a tree deeper than the source shows context use "
        "only when it goes beyond what the participant's winning model produces: 'beyond the winning model' "
        "counts participants whose observed status occurs in under 5% of the simulated replicates "
        "(a posterior predictive check).",)
    return Section("trees", heading, paragraphs, figures=tuple(shown), tables=tuple(tables))


def status_shares(whole: pd.DataFrame, contexts: pd.DataFrame | None) -> pd.DataFrame:
    """Return per group x source context: shares of participants by observed status, and the models' shares.

    ``whole`` is context_agreement's whole-session rows; ``contexts`` (the
    contexts table) gives each participant's expected_distinguished, _merged
    and _split_deeper (the share of replicates of the winning model with that
    status), averaged over the group's participants.
    """
    counts = pd.crosstab([whole["group"], whole["source_context"]], whole["status"])
    counts = counts.reindex(columns=list(STATUS_WORDS), fill_value=0)
    n = counts.sum(axis=1)
    out = counts.div(n, axis=0).rename(columns={"split-deeper": "split_deeper"})
    out["n_participants"] = n
    agg = whole.groupby(["group", "source_context"]).agg(
        depth=("depth", "first"), expected_status_share=("expected_status_share", "mean"),
        beyond_model=("beyond_model", lambda v: int(v.astype("boolean").fillna(False).sum())))
    out = out.join(agg)
    if contexts is not None and {"expected_distinguished", "in_source_tree"} <= set(contexts.columns):
        mine = contexts[(contexts["block"] == ALL) & (contexts["session"] == ALL)]
        model = mine.groupby(["group", "context"])[
            ["expected_distinguished", "expected_merged", "expected_split_deeper"]].mean()
        model.index = model.index.set_names(["group", "source_context"])
        out = out.join(model.rename(columns=lambda c: c.replace("expected_", "model_")))
    order = {c: i for i, c in enumerate(dict.fromkeys(whole["source_context"]))}
    out = out.reset_index()
    return out.sort_values(["group", "source_context"], key=lambda s: s.map(order) if s.name != "group" else s,
                           kind="stable").reset_index(drop=True)


def tree_figure(contexts: Sequence[str], shares: Mapping[str, object], *, title: str) -> Figure:
    """Return a node-link drawing of the context tree whose leaves are ``contexts`` (labels oldest first).

    Root '*' at the top; a child prepends an older symbol. With ``shares``
    (per leaf, a row with distinguished, merged, split_deeper and optionally
    model_* shares) each leaf is coloured by its share of participants that
    distinguish it (cividis) and annotated "D / M / S" with the winning
    models' shares in brackets.
    """
    leaves = [tuple(c.split("-")) if c != ROOT else () for c in contexts]
    nodes = {leaf[i:] for leaf in leaves for i in range(len(leaf) + 1)}
    children: dict[tuple[str, ...], list[tuple[str, ...]]] = {}
    for node in sorted(nodes, key=lambda n: (len(n), n)):
        if node:
            children.setdefault(node[1:], []).append(node)
    position: dict[tuple[str, ...], float] = {}

    def place(node: tuple[str, ...], start: float) -> float:
        kids = children.get(node, [])
        if not kids:
            position[node] = start
            return start + 1.0
        for kid in kids:
            start = place(kid, start)
        position[node] = float(np.mean([position[k] for k in kids]))
        return start

    width = place((), 0.0)
    depth = max((len(n) for n in nodes), default=0)
    fig, (ax,) = new_figure(width=max(4.0, 2.3 * width), height=1.5 * depth + 2.2)
    cmap = colormaps[HEATMAP]
    for node in nodes:
        for kid in children.get(node, []):
            ax.plot([position[node], position[kid]], [-len(node), -len(kid)], color="0.5", linewidth=1, zorder=1)
            ax.text((position[node] + position[kid]) / 2, -(len(node) + len(kid)) / 2, f" {kid[0]}",
                    fontsize="small", color="0.35", ha="left", va="center")
    for node in nodes:
        label = "-".join(node) if node else ROOT
        row = shares.get(label)
        face = "white" if row is None else cmap(float(getattr(row, "distinguished")))
        ax.scatter([position[node]], [-len(node)], s=420, color=face, edgecolors="black", zorder=2)
        ax.text(position[node], -len(node) + 0.28, label, ha="center", va="bottom", fontsize="small")
        if row is not None:
            ax.text(position[node], -len(node) - 0.28, _leaf_text(row), ha="center", va="top", fontsize="x-small")
    ax.set_xlim(-0.8, width - 0.2)
    ax.set_ylim(-depth - 1.1, 0.8)
    ax.set_yticks([-d for d in range(depth + 1)], [str(d) for d in range(depth + 1)])
    ax.set_ylabel("context length (symbols back)")
    ax.set_xticks([])
    for side in ("top", "right", "bottom"):
        ax.spines[side].set_visible(False)
    ax.set_title(title)
    if shares:
        fig.colorbar(ScalarMappable(Normalize(0, 1), cmap), ax=ax,
                     label="share of participants distinguishing it")
    return fig


def _leaf_text(row: object) -> str:
    parts = []
    for short, key in (("D", "distinguished"), ("M", "merged"), ("S", "split_deeper")):
        text = f"{short} {number(float(getattr(row, key)), '.2f')}"
        model = getattr(row, f"model_{key}", None)
        if model is not None and not pd.isna(model):
            text += f" ({number(float(model), '.2f')})"
        parts.append(text)
    return "\n".join(parts)


def _slug(label: str) -> str:
    return "".join(ch if ch.isalnum() or ch in "-_" else "_" for ch in str(label))


def _rt_section(folder: _Folder, provisional: bool) -> Section:
    heading = "Reaction times"
    if not folder.has("rt"):
        return _absent("rt", heading, "No rt/ folder: the log has no reaction times, or the RT step was not run.")
    compare = folder.table("rt/rt_compare")
    paragraphs, tables = [], []
    if compare is not None and len(compare):
        called = compare["called"].astype("boolean").fillna(False)
        bayes = compare["criterion"].iloc[0] != "bic_sum"
        if bayes:
            paragraphs.extend(_provisional_line(provisional))
        if not called.any():
            paragraphs.append("Not called: the data do not single out one model of the reaction times "
                              "(the reasons are listed below). The ranking is shown for completeness only.")
        else:
            basis = "PSIS-LOO over participant x block units" if bayes else "summed BIC, margin of at least 10"
            paragraphs.append(f"Called on {basis}: {compare.sort_values('rank')['model'].iloc[0]} ranks first.")
        tables.append(_table(compare, {
            "model": "model", "rank": "rank", "criterion": "criterion", "bic_sum": "summed BIC",
            "d_bic_sum": "BIC difference to the first", "elpd": "ELPD (LOO)", "se": "SE",
            "d_elpd": "ELPD difference", "dse": "SE of difference", "weight": "weight", "called": "called",
            "provisional": "provisional"}, "Models of the reaction times, whole session",
            {"bic_sum": ".1f", "d_bic_sum": ".1f", "elpd": ".1f", "se": ".1f", "d_elpd": ".1f", "dse": ".1f"}))
    diagnostics = folder.table("rt/rt_diagnostics")
    if diagnostics is not None and len(diagnostics):
        tables.append(_diagnostics_table(diagnostics, "model", "Diagnostics of the hierarchical RT models"))
    else:
        paragraphs.append("No hierarchical Bayesian RT model was run: models are ranked by summed BIC.")
    return Section("rt", heading, tuple(paragraphs), _lines(folder.text("rt/summary.txt")), tables=tuple(tables))


def _events_section(folder: _Folder) -> Section:
    heading = "Event files"
    if not folder.has("events"):
        return _absent("events", heading, "No events/ folder: no event files were written.")
    files = sorted(p.relative_to(folder.root / "events").as_posix()
                   for p in (folder.root / "events").rglob("*") if p.is_file())
    return Section("events", heading, (f"events/ holds {plural(len(files), 'file')} for the EEG analysis:",),
                   tuple(files))


def _design_section(folder: _Folder, figures: dict[str, Figure]) -> Section:
    heading = "Design check"
    if not folder.has("recovery"):
        return _absent("design", heading, "No recovery/ folder: no design check was run.")
    shown = []
    confusion = folder.table("recovery/confusion")
    if confusion is not None and len(confusion):
        for trials, cell in confusion.groupby("trials", sort=True):
            name = f"confusion_{trials}"
            figures[name] = confusion_heatmap(
                cell, title=f"Model recovery at {trials} trials per participant")
            shown.append((f"figures/{name}.png", f"Share of simulated participants of each generating model "
                          f"best fitted by each model, {trials} trials per participant."))
    answer = _lines(folder.text("recovery/answer.txt"))
    return Section("design", heading, answer or ("recovery/answer.txt is missing.",), figures=tuple(shown))


# --------------------------------------------------------------------------- run details and methods


def _run_lines(manifest: Mapping[str, object]) -> tuple[str, ...]:
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


def _methods(folder: _Folder) -> tuple[Method, ...]:
    """Return the methods used by the steps present, with formulas and citations."""
    out = []
    if folder.has("fit"):
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
    if folder.has("rt"):
        out += [
            Method("RT regressions", "log RT = b0 + b · entropy (or surprise) + c · block, by OLS with "
                   "heteroscedasticity- and autocorrelation-consistent errors.", "Newey & West (1987)"),
            Method("Bayesian RT comparison", "hierarchical models compared by expected log predictive density "
                   "estimated with Pareto-smoothed importance sampling leave-one-out; units with Pareto "
                   "k above 0.7 left out and the model refitted without them (exact leave-one-out).",
                   "Vehtari, Gelman & Gabry (2017)"),
        ]
    if folder.has("groups"):
        out += [
            Method("Hierarchical group models", "group × block cell means with participant random effects; "
                   "centred or non-centred parameterisation by the strength of the data.",
                   "Betancourt & Girolami (2015)"),
            Method("Multiple comparisons", "permutation p-values corrected step-down across blocks and "
                   "contrasts.", "Holm (1979)"),
        ]
    if folder.has("rt") or folder.has("groups"):
        out.append(Method("Diagnostics gate", "rank-normalised R-hat ≤ 1.01, bulk ESS ≥ 100 per chain, no "
                          "divergences; otherwise a comparison is not called.", "common practice"))
    if folder.has("recovery"):
        out.append(Method("Design check intervals", "exact binomial intervals of the recovery fractions.",
                          "Clopper & Pearson (1934)"))
    return tuple(out)
