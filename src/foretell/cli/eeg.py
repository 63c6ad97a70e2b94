"""The ``foretell eeg`` subcommand: its options, and the command that runs the eeg step."""

from __future__ import annotations

import argparse


def eeg_parser(command) -> None:
    """Add the ``eeg`` subcommand through ``command`` (the adder of :func:`foretell.cli.parser.build_parser`)."""
    from .parser import _backend_options, _force, _jobs_option, _log_options, count

    p = command("eeg", "explain single-trial EEG epochs by each learner's surprise or entropy",
                "foretell eeg study.csv --task lantern-relay --epochs 'eeg/{participant}_ses-{session}-epo.fif' "
                "--locked reveal --out eeg/",
                "foretell eeg study.csv --task lantern-relay --epochs derivatives/ --fits results/ "
                "--window 0.2,0.6 --channels Cz,CPz,Pz --out eeg/",
                more="Per participant and model: a regression at every channel x time point, the\n"
                     "leave-one-block-out log-likelihood of the EEG against nuisance terms only, then\n"
                     "random-effects selection and cluster permutation tests of the beta maps.\n"
                     "--epochs: a pattern with {participant}, {session}, {sub}, {ses}, or a BIDS\n"
                     "derivatives folder (sub-<label>/[ses-<label>/]eeg/*_epo.fif). Needs mne:\n"
                     "pip install 'foretell[eeg]'.\n")
    _log_options(p)
    p.add_argument("--epochs", required=True, help="pattern of the epochs files (*-epo.fif) or a BIDS "
                                                   "derivatives folder")
    p.add_argument("--out", required=True, help="folder for the results")
    p.add_argument("--models", help="comma-separated model ids (default: the fitted models, or the task's set "
                                    "without leaky models when no --fits is given)")
    p.add_argument("--fits", metavar="DIR", help="a foretell fit output whose learner parameters are used")
    p.add_argument("--locked", help="the event the epochs are locked to: guess or reveal (reaction designs: "
                                    "stimulus); default the trial's first event")
    p.add_argument("--regressors", help="comma-separated per-model quantities (default surprise after the "
                                        "stimulus, entropy before it)")
    p.add_argument("--window", help="TMIN,TMAX seconds scored by the model comparison (default the epoch)")
    p.add_argument("--channels", help="comma-separated channels scored by the model comparison (default all)")
    p.add_argument("--reference", help="group the other groups are compared with by the two-sample test")
    p.add_argument("--permutations", type=count(0), default=1000, dest="n_permutations",
                   help="permutations per cluster test (0: no test, no montage needed; default 1000)")
    p.add_argument("--pick", choices=("same", "common"), default="same",
                   help="channel sets that differ across files: refuse (same) or keep the common channels")
    p.add_argument("--seed", type=count(0), default=0, help="seed of the permutations (default 0)")
    _jobs_option(p, "participants")
    _backend_options(p)
    _force(p)


def _window(text: str | None) -> tuple[float, float] | None:
    """Return the seconds of ``--window TMIN,TMAX`` (usage error otherwise)."""
    from ..errors import UsageError
    from .commands import csv_list

    if text is None:
        return None
    values = csv_list(text) or []
    try:
        lo, hi = (float(v) for v in values)
    except ValueError:
        raise UsageError(f"--window expects two times in seconds, e.g. 0.2,0.6; got {text!r}") from None
    return lo, hi


def cmd_eeg(args: argparse.Namespace) -> int:
    """``foretell eeg``: single-trial regression of EEG epochs on learner quantities."""
    from ..folders import as_fit
    from ..labels import ALL
    from ..steps.eeg import CLUSTER_P, analyze_eeg
    from .commands import PROGRESS, _fit_folder, _load, _run, _task_inputs, csv_list, say
    from .lab import profile_inputs
    from .names import model_ids

    task, log = _load(args)
    reads = _fit_folder(args, "fits")
    fitted = as_fit(reads[0], log, task) if reads else None
    window = _window(args.window)

    def step():
        return analyze_eeg(log, task, epochs=args.epochs, fit=fitted, models=model_ids(args.models, task),
                           seed=args.seed, n_jobs=args.jobs, locked=args.locked,
                           regressors=csv_list(args.regressors), window=window,
                           channels=csv_list(args.channels), reference=args.reference,
                           n_permutations=args.n_permutations, pick=args.pick, progress=PROGRESS)

    result = _run(args, step, task=task, log=log, inputs=[*log.sources, *_task_inputs(task),
                                                           *profile_inputs(args)], reads=reads)
    called = result.clusters[(result.clusters["p"] < CLUSTER_P) & (result.clusters["contrast"] == ALL)]
    say(f"{len(called)} clusters with p < {CLUSTER_P:g} over {result.betas.sizes['participant']} participants")
    return 0
