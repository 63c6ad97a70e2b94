"""The eeg step: single-trial regression of epochs on learner quantities, learner comparison, cluster tests."""

from __future__ import annotations

from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from typing import ClassVar

import numpy as np
import pandas as pd
from joblib import Parallel, delayed


from foretell.compare import selection, selection_blocks
from foretell.eegio import PICKS, epochs_path, evoked_bytes, header, read_epochs, require_mne, shared_channels
from foretell.errors import InputError, Problem, UsageError
from foretell.folders import as_fit
from foretell.inputs import as_log, as_task
from foretell.labels import ALL, block_label
from foretell.models import model_specs
from foretell.progress import stage
from foretell.outputs import netcdf_bytes
from foretell.regressors import REGRESSORS, design
from foretell.results import Result
from foretell.stats.massols import centred_squares, fold_sums, heldout_loglik, ols_maps
from foretell.steps.bids import column_name, file_labels
from foretell.steps.epochs import to_metadata
from foretell.steps.events import AFTER_STIMULUS, BEFORE_STIMULUS, EVENTS, default_event_models
from foretell.summaries import verdict
from foretell.text import plural
from foretell.validation import check_count, check_n_jobs, check_option, check_seed, child_rng

BASELINE = "none"
"""The model of nuisance terms only, against which every learner's held-out score is compared."""
NUISANCE = ("block", "trial")
"""Nuisance terms of every design (z-scored within participant); after the stimulus also prev_correct."""
MICROVOLT = 1e6
"""EEG channels are stored in volts (MNE); betas are reported in µV."""
CLUSTER_P = 0.05
"""A cluster with p below this is reported as found in the console line (common practice)."""
COMPARE_COLUMNS = ("participant", "group", "session", "block", "model", "cv_loglik", "n_epochs", "delta_cv_loglik")
CLUSTER_COLUMNS = ("model", "regressor", "contrast", "cluster", "channels", "tmin", "tmax", "stat", "p",
                   "n_permutations")


@dataclass(frozen=True, eq=False, kw_only=True)
class EEGResult(Result):
    """The single-trial regression of EEG epochs on learner quantities (:func:`analyze_eeg`).

    Attributes
    ----------
    betas : xarray.Dataset
        beta (µV per SD of the regressor), beta_raw (µV per regressor unit),
        se, t over participant x model x regressor x channel x time.
    compare : pandas.DataFrame
        Participant x model x (session, block; ``all`` for the sum): held-out log-likelihood.
    selection, selection_blocks : pandas.DataFrame
        Random-effects selection of the learners (and ``none``) on the held-out EEG, as ``selection.csv``.
    clusters : pandas.DataFrame
        Every cluster of every permutation test, columns :data:`CLUSTER_COLUMNS`.
    evoked : mapping of str to mne.Evoked
        "<model>_<regressor>" -> the group-mean beta map (V per SD).
    """

    step: ClassVar[str] = "eeg"
    betas: object
    compare: pd.DataFrame
    selection: pd.DataFrame
    selection_blocks: pd.DataFrame
    clusters: pd.DataFrame
    evoked: Mapping[str, object]

    def tables(self) -> dict[str, pd.DataFrame]:
        """Return eeg_compare, eeg_selection, eeg_selection_blocks and eeg_clusters."""
        return {"eeg_compare": self.compare, "eeg_selection": self.selection,
                "eeg_selection_blocks": self.selection_blocks, "eeg_clusters": self.clusters}

    def texts(self) -> dict[str, str]:
        """Return eeg_summary.txt: the notes, one per line."""
        return {"eeg_summary.txt": "".join(f"{n}\n" for n in self.notes)}

    def blobs(self) -> dict[str, bytes]:
        """Return eeg_betas.nc and one ``evoked/<model>_<regressor>-ave.fif`` per group-mean map."""
        return {"eeg_betas.nc": netcdf_bytes(self.betas)} | {
            f"evoked/{name}-ave.fif": evoked_bytes(evoked) for name, evoked in self.evoked.items()}

    def figure_makers(self) -> dict[str, Callable[[], object]]:
        """Return eeg_compare and, per model with a cluster, eeg_<model> (its strongest cluster)."""
        from foretell.plots.eeg import cluster_figure, compare_figure

        makers = {"eeg_compare": lambda: compare_figure(self.compare)}
        whole = self.clusters[self.clusters["contrast"] == ALL]
        for model, rows in whole.groupby("model", sort=False):
            top = rows.sort_values(["p", "stat"], key=lambda c: c.abs() if c.name == "stat" else c,
                                   ascending=[True, False]).iloc[0]
            evoked = self.evoked[f"{model}_{top['regressor']}"]
            makers[f"eeg_{model}"] = lambda e=evoked, r=top: cluster_figure(e, r)
        return makers


def analyze_eeg(log: object, task: object, *, epochs: object, fit: object = None,
                models: Sequence[str] | None = None, seed: object = 0, n_jobs: int = 1,
                progress: bool | None = None, locked: str | None = None,
                regressors: Sequence[str] | None = None, window: tuple[float, float] | None = None,
                channels: Sequence[str] | None = None, reference: str | None = None,
                n_permutations: int = 1000, pick: str = "same") -> EEGResult:
    """Return the single-trial regression of every participant's epochs on each learner's quantities.

    Per participant and model, each channel x time point is regressed on 1 + the model's
    regressors + nuisance terms (block and trial within the session; after the stimulus also
    prev_correct), all z-scored within the participant: betas are µV per SD (``beta_raw``: per
    unit). Learners and ``none`` (nuisance terms only) are compared by the leave-one-block-out
    Gaussian log-likelihood (:func:`foretell.stats.massols.heldout_loglik`) of each epoch's mean
    over the scored window and channels (one value per epoch: the points of an epoch are not
    independent, so their log-likelihoods are not summed), then by
    random-effects selection (:func:`foretell.compare.selection`, criterion "cv"). Each model's
    first regressor's beta maps get a spatio-temporal cluster permutation test (one-sample
    against 0; two-sample F per group against ``reference``).

    Parameters
    ----------
    log, task
        The response log and task (:func:`foretell.inputs.as_log`, :func:`~foretell.inputs.as_task`).
    epochs : str or pathlib.Path
        A pattern with placeholders, or a BIDS derivatives folder (:func:`foretell.eegio.epochs_path`).
    fit : FitResult or a ``foretell fit`` folder, optional
        Learner values per participant (:func:`foretell.folders.as_fit`).
    models : sequence of str, optional
        Default :func:`foretell.steps.events.default_event_models`.
    seed : int or numpy.random.Generator, default 0
        Each permutation test draws from ``child_rng(seed, model, regressor, contrast)``.
    n_jobs : int, default 1
        Processes over participants, and for the permutation tests.
    progress : bool, optional
        Participants fitted, on stderr (:func:`foretell.progress.shown`: True a bar on a
        terminal and plain lines otherwise; None only on a terminal).
    locked : {"guess", "reveal"} or {"stimulus"}, optional
        The event the epochs are locked to (default the design's first event).
    regressors : sequence of str, optional
        Per-model quantities (default surprise after the stimulus, entropy before it);
        quantities known only after the locked event are refused.
    window, channels : (float, float) and sequence of str, optional
        The seconds and channels the comparison scores (default the whole epoch, all channels).
    reference : str, optional
        The group the others are compared with by the two-sample test.
    n_permutations : int, default 1000
        0 runs no cluster test (and needs no montage).
    pick : {"same", "common"}, default "same"
        Channel sets that differ across files: refused, or reduced to the common channels.

    Returns
    -------
    EEGResult

    Raises
    ------
    UsageError, InputError
        For bad options; for missing, unreadable or mismatched epochs files (before any work).

    References
    ----------
    Hauk, O. et al. (2006). NeuroImage 30, 1383-1400. Smith, N. J. & Kutas, M. (2015).
    Psychophysiology 52, 157-168. Maris, E. & Oostenveld, R. (2007). J. Neurosci. Methods 164, 177-190.
    """
    mne, task = require_mne(), as_task(task)
    log = as_log(log, task)
    seed, n_jobs = check_seed(seed), check_n_jobs(n_jobs)
    n_permutations = check_count("n_permutations", n_permutations, 0)
    check_option("pick", pick, PICKS)
    kinds = [kind for kind, _ in EVENTS[design(task)]]
    locked = kinds[0] if locked is None else check_option("locked", locked, kinds)
    names = _regressor_names(regressors, locked in BEFORE_STIMULUS)
    fitted = as_fit(fit, log, task)
    specs = model_specs(models if models is not None else default_event_models(task, fitted), task)
    groups = _groups(log.frame)
    if reference is not None:
        check_option("reference", reference, sorted(groups.dropna().unique()))
    labels, _ = file_labels(log.frame, task.name)
    files, keep, times, info = _epochs_files(mne, epochs, labels, pick, n_permutations > 0)
    score = _score_mask(keep, times, window, channels, files[0][1])
    pids = list(dict.fromkeys(labels["participant"].astype(str)))
    done = _per_participant(pids, files, (log, task, specs, fitted, locked, names, keep, score), n_jobs, progress)
    compare = pd.concat([d[1] for d in done], ignore_index=True)
    compare.insert(1, "group", compare["participant"].map(groups))
    betas = _dataset([d[0] for d in done], pids, [BASELINE, *(s.model_id for s in specs)], names, keep, times)
    notes = [n for d in done for n in d[2]]
    sel, sel_blocks = _selection(compare, seed)
    notes += [f"EEG, group {g}: {verdict(rows, 'model')[2]}" for g, rows in sel.groupby("group", sort=False)]
    clusters, evoked = _group_maps(mne, betas, [s.model_id for s in specs], names[0], groups, reference, info, n_permutations,
                                   seed, n_jobs)
    settings = {"epochs": str(epochs), "models": [s.model_id for s in specs], "seed": seed, "n_jobs": n_jobs,
                "locked": locked, "regressors": names, "window": window and list(window),
                "channels": channels and list(channels), "reference": reference,
                "n_permutations": n_permutations, "pick": pick}
    return EEGResult(task=task, specs=tuple(specs), settings=settings, notes=tuple(notes), betas=betas,
                     compare=compare, selection=sel, selection_blocks=sel_blocks, clusters=clusters,
                     evoked=evoked)


def _epochs_files(mne, epochs: object, labels: pd.DataFrame, pick: str, positions: bool):
    """Return (participant x session rows with their files, channels kept, sample times, their mne.Info).

    Every file's header is read (no data) before any work, so that a missing
    or mismatched file stops the step at once.
    """
    files = [(row, epochs_path(epochs, row)) for _, row in labels.iterrows()]
    headers = [(_who(row), header(path, _who(row))) for row, path in files]
    keep = shared_channels(headers, pick)
    first = headers[0][1]
    info = mne.pick_info(first.info, [first.info.ch_names.index(c) for c in keep])
    if positions and info.get_montage() is None:
        raise InputError(Problem("the epochs have no channel positions, which the cluster test needs for "
                                 "adjacency: set a montage (epochs.set_montage) or give n_permutations=0",
                                 str(first.path)))
    return files, keep, first.times, info


def _groups(frame: pd.DataFrame) -> pd.Series:
    """Return participant -> group (NA where the log has no group column)."""
    pids = pd.unique(frame["participant"].astype(str))
    if "group" not in frame.columns:
        return pd.Series(pd.NA, index=pids, dtype="string")
    return frame.groupby(frame["participant"].astype(str), sort=False)["group"].first().astype("string")


def _who(row: pd.Series) -> str:
    return f"participant {row['participant']}, session {block_label(row['session'])}"


def _regressor_names(regressors: Sequence[str] | None, before: bool) -> list[str]:
    """Return the per-model regressors, refusing those not known at the locked event."""
    if regressors is None:
        return ["entropy" if before else "surprise"]
    names = [str(check_option("regressors", r, REGRESSORS)) for r in regressors]
    later = [r for r in names if before and r in AFTER_STIMULUS]
    if later or not names:
        raise UsageError(f"{', '.join(later)} is known only after the stimulus, so it cannot explain epochs "
                         "locked before it: choose other regressors or lock to the reveal" if later
                         else "regressors must name at least one quantity")
    return list(dict.fromkeys(names))


def _score_mask(keep: tuple[str, ...], times: np.ndarray, window, channels, path) -> np.ndarray:
    """Return the (channel x time) flattened mask of the points the comparison scores."""
    lo, hi = (times[0], times[-1]) if window is None else (float(window[0]), float(window[1]))
    if not times[0] <= lo < hi <= times[-1] + 1e-9:
        raise InputError(Problem(f"window ({lo:g}, {hi:g}) s is not inside the epochs "
                                 f"({times[0]:g} to {times[-1]:g} s): give a window within them", str(path)))
    chosen = list(keep) if channels is None else [str(c) for c in channels]
    unknown = [c for c in chosen if c not in keep]
    if unknown:
        raise InputError(Problem(f"channels {', '.join(unknown)} are not in the epochs", str(path)))
    return (np.isin(keep, chosen)[:, None] & ((times >= lo) & (times <= hi))[None, :]).ravel()


def _per_participant(pids: list[str], files: list, shared: tuple, n_jobs: int, progress: bool | None) -> list:
    """Return :func:`_participant` of each participant (its epochs files and ``shared``), in order, with progress."""
    jobs = (delayed(_participant)(pid, [f for f in files if str(f[0]["participant"]) == pid], *shared)
            for pid in pids)
    done = []
    with stage("eeg", "participants fitted", len(pids), progress) as bar:
        for one in Parallel(n_jobs=n_jobs, return_as="generator")(jobs):
            done.append(one)
            bar.advance()
    return done


def _participant(pid: str, files: list, log, task, specs, fitted, locked: str, names: list[str],
                 keep: tuple[str, ...], score: np.ndarray) -> tuple[dict, pd.DataFrame, list[str]]:
    """Return one participant's maps (model x regressor x channel x time), compare rows and notes."""
    y, meta = _load(pid, files, log, task, specs, fitted, locked, keep)
    ids = [s.model_id for s in specs]
    nuisance = {t: meta[t].to_numpy(float) for t in NUISANCE}
    if locked not in BEFORE_STIMULUS:
        nuisance["prev_correct"] = meta[column_name("prev_correct", ids[0])].to_numpy(float)
    learner = {BASELINE: np.empty((len(meta), 0))} | {
        m: np.column_stack([meta[column_name(r, m)].to_numpy(float) for r in names]) for m in ids}
    ok = np.isfinite(np.column_stack([*nuisance.values(), *learner.values()])).all(axis=1)
    blocks = meta.loc[ok, ["session", "block"]].astype(str).agg("/".join, axis=1)
    folds = pd.factorize(blocks)[0]
    prepared = centred_squares(y[ok], folds)
    # the comparison scores one value per epoch, the mean over the scored channels x times: the points of
    # one epoch are strongly correlated, and summing their log-likelihoods as if independent would
    # multiply the evidence by the number of points
    region = centred_squares(y[ok][:, score].mean(axis=1, keepdims=True), folds)
    del y
    base = np.column_stack([np.ones(ok.sum()), *(_z(v[ok]) for v in nuisance.values())])
    out = {k: np.full((len(learner), len(names), len(score)), np.nan) for k in ("beta", "beta_raw", "se", "t")}
    rows, notes = [], []
    for i, (m, raw) in enumerate(learner.items()):
        raw = raw[ok]
        sd = raw.std(axis=0)
        x = np.column_stack([base[:, :1], (raw - raw.mean(axis=0)) / np.where(sd > 0, sd, 1.0), base[:, 1:]])
        sums = fold_sums(prepared, x, folds)
        try:
            maps = ols_maps(sums)
        except ValueError as err:
            notes.append(f"EEG: model {m}, participant {pid} left out: {err}")
            continue
        if m != BASELINE:
            span = slice(1, 1 + len(names))
            out["beta"][i], out["se"][i], out["t"][i] = maps.beta[span], maps.se[span], maps.t[span]
            out["beta_raw"][i] = maps.beta[span] / sd[:, None]
        cv = heldout_loglik(fold_sums(region, x, folds))
        rows += [(pid, *key.split("/"), m, value, int(n)) for key, value, n
                 in zip(pd.unique(blocks), cv, sums.counts)]
        rows.append((pid, ALL, ALL, m, float(np.sum(cv)), int(ok.sum())))
    table = pd.DataFrame(rows, columns=[c for c in COMPARE_COLUMNS if c not in ("group", "delta_cv_loglik")])
    base_cv = table[table["model"] == BASELINE].set_index(["session", "block"])["cv_loglik"]
    table["delta_cv_loglik"] = table["cv_loglik"].to_numpy() - base_cv.reindex(
        pd.MultiIndex.from_frame(table[["session", "block"]])).to_numpy()
    if (~ok).any():
        notes.append(f"EEG: participant {pid}: {plural(int((~ok).sum()), 'epoch', 'epochs')} without every "
                     "regressor left out")
    shape = (len(learner), len(names), len(keep), -1)
    return {k: v.reshape(shape) for k, v in out.items()}, table, notes


def _load(pid: str, files: list, log, task, specs, fitted, locked: str, keep: tuple[str, ...]
          ) -> tuple[np.ndarray, pd.DataFrame]:
    """Return one participant's epochs (epoch x channel*time, µV) and their trials, sessions end to end."""
    data, metas = [], []
    for row, path in files:
        epochs = read_epochs(path, _who(row), preload=True)
        metas.append(to_metadata(log, task, epochs, participant=pid, session=row["session"], models=specs,
                                 fit=fitted, locked=locked))
        data.append(epochs.get_data(picks=list(keep)) * MICROVOLT)
    meta = pd.concat(metas, ignore_index=True)
    return np.concatenate(data).reshape(len(meta), -1), meta


def _z(values: np.ndarray) -> np.ndarray:
    """Return ``values`` z-scored (0 where they are constant)."""
    sd = values.std()
    return (values - values.mean()) / sd if sd > 0 else np.zeros_like(values)


def _dataset(stats: list[dict], pids: list[str], models: list[str], names: list[str],
             keep: tuple[str, ...], times: np.ndarray):
    """Return the labelled maps: participant x model x regressor x channel x time (32-bit floats)."""
    import xarray as xr

    dims = ("participant", "model", "regressor", "channel", "time")
    units = {"beta": "uV per SD", "beta_raw": "uV per regressor unit", "se": "uV per SD", "t": "1"}
    data = {k: xr.Variable(dims, np.stack([s[k] for s in stats]).astype(np.float32), attrs={"units": unit})
            for k, unit in units.items()}
    coords = {"participant": pids, "model": models, "regressor": names, "channel": list(keep),
              "time": xr.Variable("time", times, attrs={"units": "s"})}
    return xr.Dataset(data, coords=coords)


def _selection(compare: pd.DataFrame, seed: int) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Return the random-effects selection on the held-out EEG: whole session, and per block."""
    whole = compare[compare["block"] == ALL].assign(converged=True)
    whole = whole.assign(cv_converged=whole["cv_loglik"].notna())
    parts = compare[compare["block"] != ALL].rename(columns={"cv_loglik": "cv_loglik_block"})
    parts = parts.assign(cv_converged=parts["cv_loglik_block"].notna())
    return (selection(whole, criterion="cv", seed=seed),
            selection_blocks(parts, criterion="cv", seed=seed))


def _group_maps(mne, betas, ids: list[str], regressor: str, groups: pd.Series, reference: str | None,
                info, n_permutations: int, seed: int, n_jobs: int) -> tuple[pd.DataFrame, dict]:
    """Return the cluster table and the group-mean Evoked maps of every model's first regressor."""
    from mne.stats import spatio_temporal_cluster_1samp_test, spatio_temporal_cluster_test

    with mne.utils.use_log_level("error"):
        adjacency = mne.channels.find_ch_adjacency(info, "eeg")[0] if n_permutations else None
    rows, evoked = [], {}
    times = betas["time"].to_numpy()
    for m in ids:
        maps = betas["beta"].sel(model=m, regressor=regressor).to_numpy().astype(float)
        pids = betas["participant"].to_numpy()
        usable = np.isfinite(maps).all(axis=(1, 2))
        maps, pids = maps[usable], pids[usable]
        evoked[f"{m}_{regressor}"] = mne.EvokedArray(maps.mean(axis=0) / MICROVOLT, info, tmin=times[0],
                                                     nave=len(maps), comment=f"{m} {regressor}", verbose="error")
        if not n_permutations:
            continue
        tests = [(ALL, spatio_temporal_cluster_1samp_test, maps.transpose(0, 2, 1), 0)]
        if reference is not None:
            member = groups.reindex(pids).to_numpy()
            ref = maps[member == reference].transpose(0, 2, 1)
            tests += [(f"{g} vs {reference}", spatio_temporal_cluster_test,
                       [maps[member == g].transpose(0, 2, 1), ref], 1)
                      for g in sorted(set(member[pd.notna(member)]) - {reference})]
        for contrast, test, x, tail in tests:  # F of two samples: one tail (MNE's documented use)
            t_obs, clusters, p, h0 = test(x, adjacency=adjacency, n_permutations=n_permutations, tail=tail,
                                          rng=child_rng(seed, m, regressor, contrast), n_jobs=n_jobs,
                                          out_type="indices", verbose="error")
            for k, (when, where) in enumerate(clusters):
                rows.append((m, regressor, contrast, k + 1,
                             ";".join(np.asarray(info.ch_names)[np.unique(where)]),
                             float(times[when.min()]), float(times[when.max()]),
                             float(t_obs[when, where].sum()), float(p[k]), len(h0)))
    return pd.DataFrame(rows, columns=list(CLUSTER_COLUMNS)), evoked
