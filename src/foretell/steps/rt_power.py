"""The RT design check's tables and answer: what the RT analysis called on each simulated process, and how often."""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
import pandas as pd

from foretell.simulate_rt import NULLS
from foretell.stats.intervals import CI_LEVEL, clopper_pearson, trials_to_show

TARGET_POWER = 0.8
"""The power a learner's RT effect must be shown to reach: the lower end of its Clopper-Pearson interval
(the conventional power of Cohen, 1988)."""
FALSE_POSITIVE_LEVEL = 0.05
"""The false-positive share the nulls must be shown to stay under: the upper end of its Clopper-Pearson
interval (the conventional 5% level; common practice)."""
NOT_CALLED = "none"
"""The ``called`` label of a dataset in which the RT analysis calls no learner."""
POWER_COLUMNS = ["trials", "generating", "called", "counts_as", "n_called", "n_datasets", "share", "ci95_low",
                 "ci95_high"]
"""Columns of :func:`power_table` (``rt_power.csv``)."""
RATE_COLUMNS = ["trials", "generating", "rate", "n_called", "n_datasets", "share", "ci95_low", "ci95_high", "target",
                "shown", "n_datasets_needed"]
"""Columns of :func:`rate_table` (``rt_rates.csv``)."""


def power_table(called: Sequence[dict[str, object]], counts: Sequence[int], labels: Sequence[str]) -> pd.DataFrame:
    """Return :data:`POWER_COLUMNS`: per trial count x process x called learner, datasets, share and interval.

    Parameters
    ----------
    called : sequence of dict
        One per dataset: trials, generating, dataset, called.
    counts : sequence of int
    labels : sequence of str
        The learners, in order.

    Returns
    -------
    pandas.DataFrame
        Every called label (learners, then :data:`NOT_CALLED`) for every cell,
        shares summing to 1 per trial count x process.
    """
    frame = pd.DataFrame(called, columns=["trials", "generating", "dataset", "called"])
    keys = ["trials", "generating", "called"]
    grid = pd.MultiIndex.from_product([list(counts), [*labels, *NULLS], [*labels, NOT_CALLED]], names=keys)
    table = frame.groupby(keys).size().reindex(grid, fill_value=0).rename("n_called").reset_index()
    table["n_datasets"] = table.groupby(["trials", "generating"])["n_called"].transform("sum")
    table["share"] = table["n_called"] / table["n_datasets"].where(table["n_datasets"] > 0)
    table["ci95_low"], table["ci95_high"] = clopper_pearson(table["n_called"], table["n_datasets"])
    null = table["generating"].isin(NULLS)
    table["counts_as"] = np.select(
        [table["called"] == NOT_CALLED, null, table["called"] == table["generating"]],
        ["not called", "false positive", "power"], "confusion")
    return table[POWER_COLUMNS]


def rate_table(power: pd.DataFrame) -> pd.DataFrame:
    """Return :data:`RATE_COLUMNS`: the power of each learner and the false-positive share of each null.

    A power is ``shown`` when its Clopper-Pearson lower bound reaches
    :data:`TARGET_POWER`; a false-positive share when its upper bound is at
    most :data:`FALSE_POSITIVE_LEVEL`. ``n_datasets_needed``: the datasets at
    which the share, as observed, would show it
    (:func:`foretell.stats.intervals.trials_to_show`; for false positives on
    the complementary share); missing when the observed share is not beyond
    the target.

    Parameters
    ----------
    power : pandas.DataFrame
        :func:`power_table`.

    Returns
    -------
    pandas.DataFrame
    """
    power_rows = power[power["counts_as"] == "power"].assign(rate="power", target=TARGET_POWER)
    null = power[power["generating"].isin(NULLS)]
    fp = null[null["called"] != NOT_CALLED].groupby(["trials", "generating"], sort=False) \
        .agg(n_called=("n_called", "sum"), n_datasets=("n_datasets", "first")).reset_index() \
        .assign(rate="false positive", target=FALSE_POSITIVE_LEVEL)
    fp["share"] = fp["n_called"] / fp["n_datasets"].where(fp["n_datasets"] > 0)
    fp["ci95_low"], fp["ci95_high"] = clopper_pearson(fp["n_called"], fp["n_datasets"])
    table = pd.concat([power_rows, fp], ignore_index=True)
    is_power = (table["rate"] == "power").to_numpy()
    table["shown"] = np.where(is_power, table["ci95_low"] >= TARGET_POWER, table["ci95_high"] <= FALSE_POSITIVE_LEVEL)
    needed = [trials_to_show(s, TARGET_POWER) if p else trials_to_show(1.0 - s, 1.0 - FALSE_POSITIVE_LEVEL)
              for s, p in zip(table["share"], is_power)]
    table["n_datasets_needed"] = pd.array(needed, dtype="Int64")
    order = {g: i for i, g in enumerate(dict.fromkeys(power["generating"]))}
    table = table.sort_values(["trials", "generating"], key=lambda c: c.map(order) if c.name == "generating" else c,
                              kind="stable")
    return table[RATE_COLUMNS].reset_index(drop=True)


def rt_answer(rates: pd.DataFrame, n_participants: int, n_datasets: int, law: str) -> str:
    """Return the RT design check's answer in words: the smallest trial count showing both criteria, or the shortfall.

    Parameters
    ----------
    rates : pandas.DataFrame
        :func:`rate_table`.
    n_participants, n_datasets : int
    law : str
        :meth:`foretell.simulate_rt.RTSimulation.words`.

    Returns
    -------
    str
        The criteria (:data:`TARGET_POWER`, :data:`FALSE_POSITIVE_LEVEL`) are
        conventions, and the answer names them.
    """
    head = (f"RT design check on {n_datasets} simulated datasets of {n_participants} participants per process and "
            f"trial count, each analysed as the rt step does, whose random-effects comparison calls one learner or "
            f"none (RTResult.verdict). Simulated "
            f"RTs: {law}. A learner's RT effect counts as detected when the lower end of the {CI_LEVEL:.0%} "
            f"Clopper-Pearson interval of its power (the share of its datasets in which it is called) reaches "
            f"{TARGET_POWER:.0%} (the conventional power; Cohen, 1988); false positives count as rare when the "
            f"upper end of the interval of the share of a null's datasets in which any learner is called is at "
            f"most {FALSE_POSITIVE_LEVEL:.0%} (the conventional level). ")
    for trials, part in rates.groupby("trials", sort=True):
        if part["shown"].all():
            return (head + f"{trials} trials per participant is the smallest listed count that meets both: "
                    f"{_rates_words(part)}. This holds only if RTs follow the simulated law.")
    largest = rates["trials"].max()
    part = rates[rates["trials"] == largest]
    text = head + f"No listed trial count meets both. {_power_from(rates)} At {largest} trials: {_rates_words(part)}."
    short = part[~part["shown"].astype(bool)]
    beyond = short[short["n_datasets_needed"].isna()]
    if len(beyond):
        text += (" More datasets would not show it: " + ", ".join(
            f"{r.generating}'s {r.rate} share ({r.share:.0%}) is not {'above' if r.rate == 'power' else 'below'} "
            f"{r.target:.0%}" for r in beyond.itertuples()) + ".")
    if len(beyond) < len(short):
        text += (f" At the shares observed there, {int(short['n_datasets_needed'].max())} datasets per process "
                 f"would show {'both' if beyond.empty else 'the other criteria'} (the smallest n whose "
                 f"{CI_LEVEL:.0%} Clopper-Pearson bound at the observed share reaches the target).")
    return text


def _power_from(rates: pd.DataFrame) -> str:
    """Return 'Power is shown for count-1 from 360 trials, ...; never for count-0.' over the trial counts."""
    power = rates[rates["rate"] == "power"]
    first = power[power["shown"].astype(bool)].groupby("generating", sort=False)["trials"].min()
    never = [g for g in dict.fromkeys(power["generating"]) if g not in first.index]
    parts = [f"{g} from {t} trials" for g, t in first.items()]
    text = f"Power is shown for {', '.join(parts)}" if parts else "Power is shown for no learner"
    return text + (f"; never for {', '.join(never)}." if parts and never else ".")


def _rates_words(part: pd.DataFrame) -> str:
    """Return 'power count-1 95% (CI 75%-100%), ...; false positives practice-only 5% (...)' of one trial count."""
    def words(rows: pd.DataFrame) -> str:
        return ", ".join(f"{r.generating} {r.share:.0%} ({CI_LEVEL:.0%} CI {r.ci95_low:.0%}-{r.ci95_high:.0%})"
                         for r in rows.itertuples())

    return (f"power {words(part[part['rate'] == 'power'])}; "
            f"false positives {words(part[part['rate'] == 'false positive'])}")
