"""The eeg step: mass-univariate OLS, held-out scores, epochs files, learner comparison and cluster tests."""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
import pytest

mne = pytest.importorskip("mne")
xr = pytest.importorskip("xarray")

from foretell.errors import InputError, UsageError  # noqa: E402
from foretell.logs import validate_log  # noqa: E402
from foretell.outputs import write  # noqa: E402
from foretell.regressors import regressors  # noqa: E402
from foretell.simulate import simulate_participants  # noqa: E402
from foretell.stats.massols import centred_squares, fold_sums, heldout_loglik, ols_maps  # noqa: E402
from foretell.steps.eeg import analyze_eeg  # noqa: E402
from foretell.summaries import verdict  # noqa: E402

SFREQ, TMIN, N_TIMES = 50.0, -0.1, 40
CHANNELS = ["Fp1", "Fp2", "F7", "F3", "Fz", "F4", "F8", "FC5", "FC1", "FC2", "FC6", "T7", "C3", "Cz", "C4", "T8",
            "CP5", "CP1", "CP2", "CP6", "P7", "P3", "Pz", "P4", "P8", "PO9", "O1", "Oz", "O2", "PO10", "FT9", "FT10"]
EFFECT_CHANNELS = ["C3", "Cz", "C4", "CP1", "CP2", "P3", "Pz", "P4"]
SPAN = (0.3, 0.5)
MODELS = ["count-0", "count-1", "count-2"]
PATTERN = "{participant}_ses-{session}-epo.fif"


def simulated_log(tide, n_participants=6, seed=3):
    """Participants of a depth-2 counting learner, dealt in turn to groups "a" and "b"."""
    frame, _ = simulate_participants(tide, n_participants, 4, groups={"a": ["count-2"], "b": ["count-2"]},
                                     seed=seed, block_length=30)
    for col in ("onset", "reveal_onset"):  # on the EEG's sample grid, so timing checks are exact
        frame[col] = np.round(frame[col] * SFREQ) / SFREQ
    return validate_log(frame, tide)


def info_1020():
    info = mne.create_info(CHANNELS, SFREQ, ch_types="eeg")
    with warnings.catch_warnings():  # MNE 1.13 renames the montage colin27_1020; the positions are the same
        warnings.simplefilter("ignore", FutureWarning)
        info.set_montage(mne.channels.make_standard_montage("standard_1020"))
    return info


def write_epochs(folder, log, tide, *, effect_uv, seed, info=None, drop=None):
    """Write reveal-locked epochs: surprise of count-2 at 300-500 ms over centro-parietal sites + AR(1) noise."""
    info = info_1020() if info is None else info
    times = TMIN + np.arange(N_TIMES) / SFREQ
    surprise = regressors(log, tide, ["count-2"])
    where = np.isin(info.ch_names, EFFECT_CHANNELS)[:, None] & ((times >= SPAN[0]) & (times <= SPAN[1]))[None]
    rng = np.random.default_rng(seed)
    for pid, trials in log.frame.groupby("participant", sort=False):
        s = surprise.loc[surprise["participant"] == pid, "surprise"].to_numpy()
        z = (s - s.mean()) / s.std()
        noise = rng.normal(size=(len(trials), len(info.ch_names), N_TIMES))
        for k in range(1, N_TIMES):  # AR(1) in time, phi 0.6
            noise[:, :, k] += 0.6 * noise[:, :, k - 1]
        data = (2.0 * noise + effect_uv * z[:, None, None] * where[None]) * 1e-6
        samples = np.rint(trials["reveal_onset"].to_numpy() * SFREQ).astype(int)
        events = np.c_[samples, np.zeros(len(trials), int), np.ones(len(trials), int)]
        epochs = mne.EpochsArray(data, info, events=events, tmin=TMIN, verbose="error")
        if drop is not None and pid == "p01":
            epochs.drop(drop, verbose="error")
        epochs.save(folder / f"{pid}_ses-1-epo.fif", overwrite=True, verbose="error")
    return str(folder / PATTERN)


@pytest.fixture(scope="module")
def study(tide, tmp_path_factory):
    log = simulated_log(tide)
    pattern = write_epochs(tmp_path_factory.mktemp("eeg"), log, tide, effect_uv=3.0, seed=1, drop=[0, 5])
    result = analyze_eeg(log, tide, epochs=pattern, models=MODELS, locked="reveal", window=(0.2, 0.6),
                         n_permutations=200, seed=4, reference="a")
    return log, pattern, result


# -- kernels ------------------------------------------------------------------------------------------


def test_ols_maps_equal_mne_linear_regression():
    rng = np.random.default_rng(0)
    x = np.column_stack([np.ones(60), rng.normal(size=(60, 3))])
    y = rng.normal(size=(60, 4, 9)) * 1e-6
    folds = np.repeat(np.arange(3), 20)
    mine = ols_maps(fold_sums(centred_squares(y.reshape(60, -1), folds), x, folds))
    names = ["intercept", "a", "b", "c"]
    # Reference: mne.stats.linear_regression (Gramfort et al., 2013, MNE-Python) on the same design.
    epochs = mne.EpochsArray(y, mne.create_info(4, 100.0, ch_types="eeg"), verbose="error")
    ref = mne.stats.linear_regression(epochs, x, names)
    for j, name in enumerate(names):
        np.testing.assert_allclose(mine.beta[j], ref[name].beta.data.ravel(), rtol=1e-10, atol=0)
        np.testing.assert_allclose(mine.se[j], ref[name].stderr.data.ravel(), rtol=1e-10, atol=0)
        np.testing.assert_allclose(mine.t[j], ref[name].t_val.data.ravel(), rtol=1e-10, atol=0)


def test_heldout_loglik_equals_refits_fold_by_fold():
    rng = np.random.default_rng(1)
    x = np.column_stack([np.ones(48), rng.normal(size=(48, 2))])
    y = x @ rng.normal(size=(3, 5)) + rng.normal(size=(48, 5)) * np.arange(1, 6)
    folds = np.repeat(np.arange(4), 12)
    from scipy.stats import norm

    got = heldout_loglik(fold_sums(centred_squares(y, folds), x, folds))
    for k in range(4):  # brute force: least squares on the other folds, scipy.stats.norm.logpdf (common practice)
        train, test = folds != k, folds == k
        beta = np.linalg.lstsq(x[train], y[train], rcond=None)[0]
        sigma2 = ((y[train] - x[train] @ beta) ** 2).sum(axis=0) / (train.sum() - 3)
        want = norm.logpdf(y[test], x[test] @ beta, np.sqrt(sigma2)).sum()
        assert got[k] == pytest.approx(want, rel=1e-9)


def test_ols_maps_refuse_a_rank_deficient_design():
    x = np.column_stack([np.ones(10), np.arange(10), 2 * np.arange(10)])
    folds = np.zeros(10, int)
    with pytest.raises(ValueError, match="rank deficient"):
        ols_maps(fold_sums(centred_squares(np.zeros((10, 2)), folds), x, folds))


# -- the simulated study ------------------------------------------------------------------------------


def test_the_depth_2_learner_wins_and_its_cluster_covers_the_effect(study):
    _, _, result = study
    whole = result.selection[result.selection["group"] == "all"]
    status, leader, _ = verdict(whole, "model")
    assert leader == "count-2" and status in ("ahead", "clear")
    gain = result.compare[(result.compare["block"] == "all") & (result.compare["model"] == "count-2")]
    assert (gain["delta_cv_loglik"] > 0).all()
    clusters = result.clusters[(result.clusters["model"] == "count-2") & (result.clusters["p"] < 0.05)]
    assert len(clusters) >= 1
    top = clusters.sort_values("p").iloc[0]
    assert set(top["channels"].split(";")) >= {"Cz", "CP1", "CP2", "Pz"}
    assert top["tmin"] >= SPAN[0] - 0.1 and top["tmax"] <= SPAN[1] + 0.1 and top["stat"] > 0


def test_clusters_equal_mne_called_directly_on_the_same_maps(study):
    log, _, result = study
    maps = result.betas["beta"].sel(model="count-2", regressor="surprise").to_numpy().astype(float)
    info = result.evoked["count-2_surprise"].info
    adjacency, _ = mne.channels.find_ch_adjacency(info, "eeg")
    from foretell.validation import child_rng

    # Reference: mne.stats.spatio_temporal_cluster_1samp_test (Maris & Oostenveld, 2007; Gramfort et al., 2013).
    t_obs, clusters, p, h0 = mne.stats.spatio_temporal_cluster_1samp_test(
        maps.transpose(0, 2, 1), adjacency=adjacency, n_permutations=200,
        rng=child_rng(4, "count-2", "surprise", "all"), out_type="indices", verbose="error")
    mine = result.clusters[(result.clusters["model"] == "count-2") & (result.clusters["contrast"] == "all")]
    assert len(mine) == len(clusters)
    np.testing.assert_allclose(mine["p"], p)
    np.testing.assert_allclose(mine["stat"], [t_obs[c].sum() for c in clusters], rtol=1e-6)
    assert (mine["n_permutations"] == len(h0)).all()
    groups = log.frame.groupby("participant")["group"].first().reindex(result.betas["participant"].values)
    x = [maps[(groups == g).to_numpy()].transpose(0, 2, 1) for g in ("b", "a")]
    f_obs, clusters, p, _ = mne.stats.spatio_temporal_cluster_test(
        x, adjacency=adjacency, n_permutations=200, tail=1, rng=child_rng(4, "count-2", "surprise", "b vs a"),
        out_type="indices", verbose="error")
    mine = result.clusters[(result.clusters["model"] == "count-2") & (result.clusters["contrast"] == "b vs a")]
    assert len(mine) == len(clusters)
    np.testing.assert_allclose(mine["p"], p)
    np.testing.assert_allclose(mine["stat"], [f_obs[c].sum() for c in clusters], rtol=1e-6)


def test_betas_are_labelled_and_dropped_epochs_are_matched(study):
    log, _, result = study
    beta = result.betas["beta"]
    assert beta.dims == ("participant", "model", "regressor", "channel", "time")
    assert list(beta["model"].values) == ["none", *MODELS] and beta.attrs["units"] == "uV per SD"
    counts = result.compare[(result.compare["block"] == "all") & (result.compare["model"] == "count-2")]
    n_trials = log.frame.groupby("participant").size()
    assert counts.set_index("participant")["n_epochs"]["p01"] <= n_trials["p01"] - 2
    raw = result.betas["beta_raw"].sel(model="count-2").to_numpy()
    assert np.isfinite(raw).all()


def test_writing_gives_netcdf_evoked_and_figures(study, tmp_path):
    _, _, result = study
    write(tmp_path / "out", result)
    back = xr.open_dataset(tmp_path / "out" / "eeg_betas.nc")
    assert back["beta"].shape[:3] == (6, 4, 1)
    evoked = mne.read_evokeds(tmp_path / "out" / "evoked" / "count-2_surprise-ave.fif", verbose="error")[0]
    assert evoked.nave == 6
    assert (tmp_path / "out" / "figures" / "eeg_compare.png").is_file()
    assert (tmp_path / "out" / "figures" / "eeg_count-2.png").is_file()
    for name in ("eeg_compare", "eeg_selection", "eeg_selection_blocks", "eeg_clusters"):
        assert (tmp_path / "out" / f"{name}.csv").is_file()


def test_without_an_effect_no_learner_beats_the_baseline(tide, tmp_path):
    log = simulated_log(tide, seed=8)
    pattern = write_epochs(tmp_path, log, tide, effect_uv=0.0, seed=2)
    result = analyze_eeg(log, tide, epochs=pattern, models=MODELS, locked="reveal", n_permutations=0)
    _, leader, _ = verdict(result.selection[result.selection["group"] == "all"], "model")
    assert leader in (None, "none")
    assert result.clusters.empty


# -- bad input ------------------------------------------------------------------------------------------


def test_missing_and_unreadable_files_name_the_participant(study, tmp_path):
    log, pattern, _ = study
    with pytest.raises(InputError, match="no epochs file of participant p01, session 1"):
        analyze_eeg(log, log.task, epochs=str(tmp_path / PATTERN), models=MODELS, locked="reveal")
    import shutil

    for pid in log.frame["participant"].unique():
        shutil.copy(pattern.format(participant=pid, session=1), tmp_path)
    (tmp_path / "p01_ses-1-epo.fif").write_bytes(b"not a fif file")
    with pytest.raises(InputError, match="cannot read the epochs of participant p01"):
        analyze_eeg(log, log.task, epochs=str(tmp_path / PATTERN), models=MODELS, locked="reveal")


def test_missing_or_extra_trigger_is_caught(tide, tmp_path):
    log = simulated_log(tide, n_participants=2)
    pattern = write_epochs(tmp_path, log, tide, effect_uv=0.0, seed=0)
    path = tmp_path / "p02_ses-1-epo.fif"
    epochs = mne.read_epochs(path, verbose="error")
    short = mne.EpochsArray(epochs.get_data()[1:], epochs.info, events=epochs.events[1:], tmin=TMIN,
                            verbose="error")  # a missing trigger
    short.save(path, overwrite=True, verbose="error")
    with pytest.raises(UsageError, match="119 EEG events but 120 trials of participant p02"):
        analyze_eeg(log, tide, epochs=pattern, models=MODELS, locked="reveal", n_permutations=0)
    events = epochs.events.copy()
    events[40:, 0] += 25  # a trigger lost and an extra one later: the count holds, the timing does not
    shifted = mne.EpochsArray(epochs.get_data(), epochs.info, events=events, tmin=TMIN, verbose="error")
    shifted.save(path, overwrite=True, verbose="error")
    with pytest.raises(UsageError, match="disagree"):
        analyze_eeg(log, tide, epochs=pattern, models=MODELS, locked="reveal", n_permutations=0)


def test_differing_channels_are_refused_unless_common_is_picked(tide, tmp_path):
    log = simulated_log(tide, n_participants=2)
    pattern = write_epochs(tmp_path, log, tide, effect_uv=0.0, seed=0)
    path = tmp_path / "p02_ses-1-epo.fif"
    mne.read_epochs(path, verbose="error").drop_channels(["Fp1"]).save(path, overwrite=True, verbose="error")
    with pytest.raises(InputError, match="different channels.*pick='common'"):
        analyze_eeg(log, tide, epochs=pattern, models=MODELS, locked="reveal", n_permutations=0)
    result = analyze_eeg(log, tide, epochs=pattern, models=MODELS, locked="reveal", n_permutations=0,
                         pick="common")
    assert "Fp1" not in result.betas["channel"].values and len(result.betas["channel"]) == 31


def test_different_sampling_rates_are_refused(tide, tmp_path):
    log = simulated_log(tide, n_participants=2)
    pattern = write_epochs(tmp_path, log, tide, effect_uv=0.0, seed=0)
    path = tmp_path / "p02_ses-1-epo.fif"
    epochs = mne.read_epochs(path, verbose="error")
    epochs.crop(tmax=0.5).save(path, overwrite=True, verbose="error")
    with pytest.raises(InputError, match="participant p02.*resample and crop every file alike"):
        analyze_eeg(log, tide, epochs=pattern, models=MODELS, locked="reveal", n_permutations=0)


def test_window_montage_and_late_quantities_are_checked(tide, tmp_path):
    log = simulated_log(tide, n_participants=2)
    pattern = write_epochs(tmp_path, log, tide, effect_uv=0.0, seed=0)
    with pytest.raises(InputError, match=r"window \(0.5, 1.5\) s is not inside the epochs"):
        analyze_eeg(log, tide, epochs=pattern, models=MODELS, locked="reveal", window=(0.5, 1.5))
    with pytest.raises(UsageError, match="surprise is known only after the stimulus"):
        analyze_eeg(log, tide, epochs=pattern, models=MODELS, locked="guess", regressors=["surprise"])
    bare = mne.create_info(CHANNELS, SFREQ, ch_types="eeg")
    pattern = write_epochs(tmp_path, log, tide, effect_uv=0.0, seed=0, info=bare)
    with pytest.raises(InputError, match="no channel positions"):
        analyze_eeg(log, tide, epochs=pattern, models=MODELS, locked="reveal")


def test_a_bids_derivatives_folder_is_found_by_the_events_labels(tide, tmp_path):
    log = simulated_log(tide, n_participants=2)
    write_epochs(tmp_path, log, tide, effect_uv=0.0, seed=0)
    for pid in ("p01", "p02"):  # BIDS labels of p01, p02 are the ids themselves (bids_labels)
        folder = tmp_path / "derivatives" / f"sub-{pid}" / "eeg"
        folder.mkdir(parents=True)
        (tmp_path / f"{pid}_ses-1-epo.fif").rename(folder / f"sub-{pid}_task-tidegauge_epo.fif")
    result = analyze_eeg(log, tide, epochs=tmp_path / "derivatives", models=["count-1"], locked="reveal",
                         n_permutations=0)
    assert list(result.betas["participant"].values) == ["p01", "p02"]


def test_guess_locked_epochs_default_to_entropy(tide, tmp_path):
    log = simulated_log(tide, n_participants=2)
    pattern = write_epochs(tmp_path, log, tide, effect_uv=0.0, seed=0)
    for pid, trials in log.frame.groupby("participant"):  # the same data, locked to the guess prompt
        path = pattern.format(participant=pid, session=1)
        epochs = mne.read_epochs(path, verbose="error")
        events = epochs.events.copy()
        events[:, 0] = np.rint(trials["onset"].to_numpy() * SFREQ).astype(int)
        mne.EpochsArray(epochs.get_data(), epochs.info, events=events, tmin=TMIN, verbose="error").save(
            path, overwrite=True, verbose="error")
    result = analyze_eeg(log, tide, epochs=pattern, models=["count-1"], n_permutations=0)
    assert result.settings["locked"] == "guess" and list(result.betas["regressor"].values) == ["entropy"]


def test_without_mne_the_step_says_how_to_install(study, monkeypatch):
    import sys

    log, pattern, _ = study
    monkeypatch.setitem(sys.modules, "mne", None)
    with pytest.raises(UsageError, match=r"pip install 'foretell\[eeg\]'"):
        analyze_eeg(log, log.task, epochs=pattern)


def test_the_command_writes_once_and_refuses_to_overwrite(study, tmp_path):
    from foretell.cli import main

    log, pattern, _ = study
    csv = tmp_path / "log.csv"
    log.frame[["participant", "group", "session", "block", "trial", "stimulus", "response", "rt", "onset",
               "reveal_onset"]].to_csv(csv, index=False)
    argv = ["eeg", str(csv), "--task", str(log.task.path), "--epochs", pattern, "--locked", "reveal",
            "--models", "count-2", "--permutations", "0", "--window", "0.2,0.6", "--out", str(tmp_path / "out")]
    assert main(argv) == 0
    assert (tmp_path / "out" / "eeg_compare.csv").is_file()
    assert main(argv) == 1  # the folder exists: refused without --force
    assert main([*argv[:-2], "--window", "0.2", "--out", str(tmp_path / "other")]) == 2
    assert not (tmp_path / "other").exists()


def test_analyze_with_epochs_runs_the_eeg_step_and_reports_it(study, tmp_path):
    from foretell.cli import main

    log, pattern, _ = study
    csv = tmp_path / "log.csv"
    log.frame[["participant", "group", "session", "block", "trial", "stimulus", "response", "rt", "onset",
               "reveal_onset"]].to_csv(csv, index=False)
    out = tmp_path / "whole"
    assert main(["analyze", str(csv), "--task", str(log.task.path), "--models", "count-0,count-2",
                 "--skip", "rt,groups,events", "--no-bayes", "--epochs", pattern, "--locked", "reveal",
                 "--out", str(out)]) == 0
    assert (out / "eeg" / "eeg_selection.csv").is_file()
    html = (out / "report.html").read_text()
    assert 'id="eeg"' in html and "count-2" in html.split('id="eeg"', 1)[1]


@pytest.mark.slow
def test_family_wise_false_positives_stay_near_five_percent(tide, tmp_path):
    # Without an effect, the cluster test's chance of any cluster with p < 0.05 is at most 0.05 (Maris &
    # Oostenveld, 2007). Over 20 seeded null studies, 5 or more such studies has probability 0.016 at 0.05.
    log = simulated_log(tide)
    hits = 0
    for rep in range(20):
        pattern = write_epochs(tmp_path, log, tide, effect_uv=0.0, seed=100 + rep)
        result = analyze_eeg(log, tide, epochs=pattern, models=["count-2"], locked="reveal",
                             n_permutations=200, seed=rep)
        hits += bool((result.clusters["p"] < 0.05).any())
    assert hits <= 4


def test_a_log_without_groups_is_compared_as_one(tide, tmp_path):
    log = simulated_log(tide, n_participants=2)
    pattern = write_epochs(tmp_path, log, tide, effect_uv=0.0, seed=0)
    plain = validate_log(log.frame[["participant", "session", "block", "trial", "stimulus", "response", "rt",
                                    "onset", "reveal_onset"]], tide)
    result = analyze_eeg(plain, tide, epochs=pattern, models=["count-1"], locked="reveal", n_permutations=0)
    assert result.selection["group"].tolist() == ["all", "all"] and result.compare["group"].isna().all()
