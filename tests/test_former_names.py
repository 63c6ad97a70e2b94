"""Folders written before the column renames are read back under today's names."""

from __future__ import annotations

import json

import pandas as pd

from foretell.contexts import STATUSES
from foretell.folders import ResultFolder
from foretell.outputs import MANIFEST, TOOL


def _old_folder(path, tables):
    path.mkdir()
    (path / MANIFEST).write_text(json.dumps({"tool": TOOL, "step": "rt"}), encoding="utf-8")
    for name, frame in tables.items():
        frame.to_csv(path / f"{name}.csv", index=False)
    return ResultFolder(path)


def test_old_columns_and_statuses_get_todays_names(tmp_path):
    folder = _old_folder(tmp_path / "old", {
        "rt_compare": pd.DataFrame({"model": ["count-1", "none"], "elpd": [-10.0, -15.0], "se": [1.0, 1.5],
                                    "d_elpd": [0.0, -5.0], "dse": [0.0, 1.2], "p_loo": [3.0, 2.0],
                                    "weight": [0.9, 0.1], "bor": [0.2, 0.2]}),
        "group_curves": pd.DataFrame({"group": ["a"], "mean": [0.5], "hdi_low": [0.4], "hdi_high": [0.6]}),
        "rt_population": pd.DataFrame({"parameter": ["sigma"], "mean": [8.0], "low": [7.0], "high": [9.0]}),
        "context_agreement": pd.DataFrame({"source_context": ["*"] * 4, "response_leaf": ["*", "", "", ""],
                                           "status": ["distinguished", "merged", "split-deeper", "unvisited"]}),
    })
    compare = folder.table("rt_compare")
    assert list(compare.columns) == ["model", "elpd_loo", "elpd_loo_se", "elpd_diff", "elpd_diff_se", "p_loo",
                                     "stacking_weight", "omnibus_risk"]
    assert compare["elpd_diff"].tolist() == [0.0, -5.0] and compare["stacking_weight"].tolist() == [0.9, 0.1]
    assert list(folder.table("group_curves").columns) == ["group", "mean", "hdi95_low", "hdi95_high"]
    assert list(folder.table("rt_population").columns) == ["parameter", "mean", "ci95_low", "ci95_high"]
    assert folder.table("context_agreement")["status"].tolist() == list(STATUSES)


def test_columns_that_were_never_renamed_stay(tmp_path):
    # "se" and "weight" were ELPD columns only beside d_elpd, "low" and "high" renamed only beside
    # "parameter"; elsewhere they keep their meaning (the joint contrasts state their level beside them)
    table = pd.DataFrame({"model": ["count-1"], "se": [0.3], "weight": [2.0], "status": ["merged"],
                          "low": [0.1], "high": [0.2], "level": [0.95]})
    folder = _old_folder(tmp_path / "plain", {"regression": table})
    pd.testing.assert_frame_equal(folder.table("regression"), table)
