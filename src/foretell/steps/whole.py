"""The whole job in one call: validation, fits and comparisons, reaction times, groups, events, report.

:func:`analyze` runs the steps in order and returns every table as a
DataFrame; with ``out`` it writes one plainly named subfolder per step
(``validation/``, ``fit/``, ``rt/``, ``groups/``, ``events/``, ``recovery/``)
and ``report.html`` with its figures, atomically (:mod:`foretell.outputs`).
The report reads its numbers from the very tables written beside it.
"""

from __future__ import annotations

import sys
import tempfile
import time
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path

import pandas as pd
from tqdm import tqdm

from ..errors import UsageError
from ..logs import ValidatedLog, load_log, log_summary, unscorable, validate_log
from ..models import default_warmup
from ..outputs import netcdf_bytes, write_outputs
from ..tasks import Task, load_task

STEPS = ("fit", "rt", "groups", "events", "report")
"""The steps that can be skipped (validation always runs: every other step needs a checked log)."""
DEMO_DRAWS = 300
"""Posterior draws (and tuning steps) per chain in demo mode: its Bayesian comparisons are provisional."""
DEMO_CHAINS = 2


@dataclass(frozen=True, eq=False)
class AnalysisResult:
    """Every table of a study's whole analysis, by step, and the report.

    ``tables`` maps output paths without extension (``fit/fits``,
    ``rt/rt_compare``, ``groups/curves``, ...) to DataFrames; ``texts`` maps
    file names to text (summaries, warnings, the report); ``files`` holds
    other files as bytes (figures, posteriors, events); ``fit``, ``rt``,
    ``groups``, ``events`` are the steps' own result objects (None when
    skipped or not applicable); ``notes`` are lines for the console;
    ``settings`` the options used.
    """

    tables: Mapping[str, pd.DataFrame]
    texts: Mapping[str, str]
    files: Mapping[str, bytes]
    fit: object = None
    rt: object = None
    groups: object = None
    events: object = None
    notes: tuple[str, ...] = ()
    settings: Mapping[str, object] = field(default_factory=dict)

    @property
    def report_html(self) -> str | None:
        """Return the report's HTML (None when the report step was skipped)."""
        return self.texts.get("report.html")


def analyze(log: ValidatedLog | pd.DataFrame | str | Path, task: Task | str | Path, out: str | Path | None = None,
            *, models: Sequence[str] | None = None, rt_models: Sequence[str] | None = None,
            free: Iterable[str] = (), skip: Iterable[str] = (), recovery: str | Path | None = None,
            seed: int = 0, n_jobs: int = 1, bayes: bool = True, draws: int = 1000, chains: int = 4,
            tune: int = 1000, provisional: bool = False, force: bool = False, inputs: Sequence[str | Path] = (),
            manifest: Mapping[str, object] | None = None, progress: bool | None = None,
            trials: str = "best", refits: int | None = None) -> AnalysisResult:
    """Return (and with ``out``, write) the whole analysis of a study.

    Steps, each with a progress bar: validation (summary, warnings,
    participants with nothing to fit), fit and comparison
    (:func:`foretell.fit` with ``models`` and ``free``), reaction times when
    the log has usable ones (:func:`foretell.steps.measures.analyse_rt` with
    ``rt_models``, default the fitted models, and the fitted learner
    parameters), group curves and contrasts when the log has two or more
    groups (:func:`foretell.steps.groups.compare_groups`), BIDS events
    (:func:`foretell.steps.events.events_tables`) and the report
    (:func:`foretell.report.build.build_report`). ``skip`` names steps of
    :data:`STEPS` to leave out. ``recovery`` is a ``foretell recover`` output
    folder whose tables are copied under ``recovery/`` and shown in the
    report. ``bayes`` runs the hierarchical Bayesian models of the RT and
    group steps (without it: summed BIC and permutation tests only);
    ``draws``, ``chains``, ``tune`` go to those models, ``refits`` (exact
    leave-one-out refits per RT model) to :func:`foretell.steps.measures.analyse_rt`;
    ``provisional`` marks their comparisons provisional in the report (demo
    mode). ``inputs`` are files whose SHA-256 the manifest records and that
    ``out`` may not hold.
    """
    skip = set(skip)
    unknown = skip - set(STEPS)
    if unknown:
        raise UsageError(f"cannot skip {', '.join(sorted(unknown))}: the steps are {', '.join(STEPS)}")
    if not isinstance(task, Task):
        task = load_task(task)
    if isinstance(log, pd.DataFrame):
        log = validate_log(log, task)
    elif not isinstance(log, ValidatedLog):
        log = load_log(log, task)
    if out is not None:
        from ..outputs import check_output_dir

        check_output_dir(out, inputs=inputs, force=force)
    recovery_tables = _read_recovery(Path(recovery)) if recovery is not None else {}
    started = time.perf_counter()
    timings: dict[str, float] = {}
    tables: dict[str, pd.DataFrame] = {}
    texts: dict[str, str] = {}
    files: dict[str, bytes] = {}
    notes: list[str] = []
    show = sys.stderr.isatty() if progress is None else bool(progress)
    has_rt = bool(log.frame["rt_ok"].any())
    n_groups = log.frame["group"].nunique() if "group" in log.frame.columns else 0
    planned = ["validation"] + [s for s in STEPS if s not in skip]
    results: dict[str, object] = {}
    with tqdm(total=len(planned), desc="analysis", unit="step", disable=not show, file=sys.stderr) as bar:
        for step in planned:
            bar.set_postfix_str(step)
            t0 = time.perf_counter()
            if step == "validation":
                tables["validation/summary"] = log_summary(log)
                left = unscorable(log, default_warmup(task)) if task.response == "guess" else None
                if left is not None:
                    tables["validation/unscorable"] = left
                texts["validation/warnings.txt"] = "".join(f"{w}\n" for w in log.warnings)
            elif step == "fit":
                if task.response != "guess":
                    notes.append(f"fit: not applicable to a {task.response} design")
                else:
                    from .guesses import fit

                    result = fit(log, task, models, free=free, seed=seed, n_jobs=n_jobs, progress=False)
                    results["fit"] = result
                    tables |= {f"fit/{k}": v for k, v in result.tables(trials=trials).items()}
                    texts["fit/summary.txt"] = result.summary + "\n"
                    notes += list(result.notes)
            elif step == "rt":
                if not has_rt:
                    notes.append("reaction times: none usable in this log; step skipped")
                else:
                    from .measures import analyse_rt

                    fitted = results.get("fit")
                    result = analyse_rt(log, task, rt_models or _fitted_models(fitted, models),
                                        fits=fitted.fits if fitted is not None else None, bayes=bayes,
                                        draws=draws, chains=chains, tune=tune, seed=seed, n_jobs=n_jobs,
                                        refits=refits, progress=False)
                    results["rt"] = result
                    tables |= {f"rt/{k}": v for k, v in result.tables().items()}
                    texts["rt/summary.txt"] = "".join(f"{n}\n" for n in result.notes)
                    files |= {f"rt/posterior_{m}.nc": netcdf_bytes(i) for m, i in result.posteriors.items()}
            elif step == "groups":
                if n_groups < 2:
                    notes.append("groups: the log has fewer than two groups; no group comparison")
                else:
                    from .groups import compare_groups

                    result = compare_groups(log, task, results.get("fit"), draws=draws, chains=chains,
                                            tune=tune, seed=seed, bayes=bayes, progress=False,
                                            cores=max(1, min(chains, n_jobs if n_jobs > 0 else 2)))
                    results["groups"] = result
                    tables |= {f"groups/{k}": v for k, v in result.tables().items()}
                    from ..plots.common import figure_png

                    files |= {f"groups/figures/{n}.png": figure_png(f) for n, f in result.figures.items()}
                    notes += list(result.notes)
            elif step == "events":
                from .events import events_tables, sidecar_json, to_tsv

                fitted = results.get("fit")
                fits = fitted.fits if fitted is not None else None
                result = events_tables(log, task, event_models(fits, task, models), fits=fits)
                results["events"] = result
                files |= {f"events/{name}": to_tsv(frame) for name, frame in result.files.items()}
                files |= {f"events/{name}": sidecar_json(d) for name, d in result.sidecars.items()}
                tables["events/participants"] = result.labels
                notes += list(result.warnings)
            elif step == "report":
                tables |= {f"recovery/{k}": v for k, v in recovery_tables.items() if k != "answer"}
                if "answer" in recovery_tables:
                    texts["recovery/answer.txt"] = recovery_tables["answer"]
                html, figures = _report(tables, texts, {k: v for k, v in files.items()
                                                        if k.startswith("events/")},
                                        provisional=provisional,
                                        settings={"task": task.name, "seed": seed, "draws": draws})
                texts["report.html"] = html
                files |= figures
            timings[f"{step}_s"] = round(time.perf_counter() - t0, 3)
            bar.update()
    timings["total_s"] = round(time.perf_counter() - started, 3)
    settings = {"task": task.name, "models": list(models) if models else None,
                "rt_models": list(rt_models) if rt_models else None, "free": list(free),
                "skip": sorted(skip), "seed": seed, "bayes": bayes, "draws": draws, "chains": chains, "tune": tune,
                "provisional": provisional, "trials": trials}
    result = AnalysisResult(tables, texts, files, results.get("fit"), results.get("rt"),
                            results.get("groups"), results.get("events"), tuple(notes), settings)
    if out is not None:
        record = {**dict(manifest or {}), "settings": settings, "timings_s": timings}
        write_outputs(out, tables, texts=texts, extra=files, manifest=record, inputs=inputs, force=force)
    return result


def _fitted_models(fitted: object, models: Sequence[str] | None) -> list[str] | None:
    """Return the models of the fit step (None: the task's default set)."""
    if fitted is not None:
        return list(fitted.settings["models"])
    return list(models) if models else None


def event_models(fits: pd.DataFrame | None, task: Task, models: Sequence[str] | None = None) -> list[str]:
    """Return the models whose per-trial quantities go into the events files.

    ``models``, else the fitted models (``fits``), else the task's default
    set; without fits only models whose learner needs no fitted parameter
    (no free leak): their per-trial quantities would need values nobody fitted.
    """
    from ..models import default_models, parse_model

    if models:
        return list(models)
    if fits is not None:
        return list(dict.fromkeys(fits["model"].astype(str)))
    return [m for m in default_models(task) if "leak" not in parse_model(m, task).free]


def _report(tables: Mapping[str, pd.DataFrame], texts: Mapping[str, str], files: Mapping[str, bytes], *,
            provisional: bool, settings: Mapping[str, object]) -> tuple[str, dict[str, bytes]]:
    """Return the report's HTML and figures, built from the tables as written (CSV round trip)."""
    from ..report.build import build_report

    with tempfile.TemporaryDirectory() as folder:
        stage = Path(folder) / "stage"
        write_outputs(stage, tables, texts={k: v for k, v in texts.items() if k.endswith(".txt")},
                      extra=files, manifest={"settings": dict(settings), "provisional": provisional})
        html, figures = build_report(stage, provisional=provisional)
    return html, {f"figures/{Path(name).name}": data for name, data in figures.items()}


def _read_recovery(folder: Path) -> dict[str, object]:
    """Return the tables (and answer text) of a ``foretell recover`` output folder."""
    from ..errors import InputError

    names = ("confusion", "inversion", "params", "recovery_summary", "group_check")
    missing = [n for n in names if not (folder / f"{n}.csv").is_file()]
    if missing:
        raise InputError(f"not a foretell recover output: {', '.join(f'{n}.csv' for n in missing)} "
                         "missing", path=str(folder))
    out: dict[str, object] = {n: pd.read_csv(folder / f"{n}.csv") for n in names}
    if (folder / "answer.txt").is_file():
        out["answer"] = (folder / "answer.txt").read_text(encoding="utf-8")
    return out
