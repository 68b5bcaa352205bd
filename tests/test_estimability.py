"""Thresholds that the data do not pin down are reported as "not estimable" — with the reason and the trials —
in analysis.json, every CSV, the HTML tables and plots and ``limen analyse``'s summary, never as a number and
never above 100 % contrast (issue 18, item 4).

Cells are starved on purpose from a study simulated by the documented reader model (scorer/study/reader_model.py):
one cell answered correctly on every trial (the M-AFC likelihood then has no interior maximum: it rises towards
k → ∞, Wichmann & Hill 2001, part I), one with two trials per reader, one answered at random (chance, Pc = 1/M;
Green & Swets 1966), and one left as it was, which must stay a number.
"""

from __future__ import annotations

import io
import json
import math
import re

import numpy as np
import pandas as pd
import pytest
from click.testing import CliRunner

from scorer.cli import main
from scorer.study import analyse_study, simulate_reader_study, validate_trials
from scorer.study.estimability import EstimabilityRule, judge_curves, public_curves, reasons_for

GOOD = ("direct", 0.25)
ALL_CORRECT = ("direct", 1.0)
FEW = ("indirect", 0.25)
CHANCE = ("indirect", 1.0)


@pytest.fixture(scope="module")
def starved(tmp_path_factory):
    st = simulate_reader_study(np.random.default_rng(7), 4, diameters_mm=(0.25, 1.0), n_images=8, m_alternatives=4)
    df = st.trials.copy()
    rng = np.random.default_rng(8)
    det, dia = df["detector"], df["diameter_mm"]
    sel = (det == ALL_CORRECT[0]) & np.isclose(dia, ALL_CORRECT[1])
    df.loc[sel, "chosen_site"] = df.loc[sel, "true_site"]
    sel = (det == CHANCE[0]) & np.isclose(dia, CHANCE[1])
    df.loc[sel, "chosen_site"] = rng.integers(0, 4, int(sel.sum()))
    df["correct"] = (df["chosen_site"] == df["true_site"]).astype(int)
    few = (det == FEW[0]) & np.isclose(dia, FEW[1])
    keep = df[few].groupby("reader").head(2).index
    df = df[~few | df.index.isin(keep)].reset_index(drop=True)
    d = tmp_path_factory.mktemp("starved")
    df.to_csv(d / "reads.csv", index=False)
    st.model_trials.to_csv(d / "model.csv", index=False)
    return d, validate_trials(df), validate_trials(st.model_trials)


def _row(df, cell, reader="pooled"):
    r = df[(df["reader"] == reader) & (df["detector"] == cell[0]) & np.isclose(df["diameter_mm"], cell[1])]
    assert len(r) == 1, (cell, reader)
    return r.iloc[0]


def test_starved_cells_are_not_estimable_and_say_why(starved):
    _, trials, model = starved
    a = analyse_study(trials, model, n_boot=100, seed=1)
    pc = a.pooled_curves
    good = _row(pc, GOOD)
    assert good["estimable"] and good["not_estimable"] == ""
    assert 0 < good["ci_low"] < good["threshold_contrast"] < good["ci_high"] < 1
    assert "no interior maximum" in _row(pc, ALL_CORRECT)["not_estimable"]
    few = _row(pc, FEW)
    assert not few["estimable"] and "8 trials, fewer than 40 (10 per reader)" in few["not_estimable"]
    chance = _row(pc, CHANCE)
    assert not chance["estimable"], chance.to_dict()
    # every starved cell of every reader too; the untouched cell's readers keep their numbers
    rc = a.reader_curves
    for cell in (ALL_CORRECT, FEW):
        sub = rc[(rc["detector"] == cell[0]) & np.isclose(rc["diameter_mm"], cell[1])]
        assert len(sub) == 4 and not sub["estimable"].any()
    # the public tables (what every output shows) never hold a number for them
    pub = a.public_tables()["pooled_curves"]
    for cell in (ALL_CORRECT, FEW, CHANCE):
        r = _row(pub, cell)
        assert all(math.isnan(r[c]) for c in ("threshold_contrast", "ci_low", "ci_high")), r.to_dict()
        assert r["n_trials"] > 0
    # a comparison resting on a not-estimable pooled threshold is not a number either (0.25 mm), and at 1.0 mm
    # no reader has a fit with an interior maximum on the all-correct detector: no comparison at all
    pub = a.public_tables()["comparison"]
    diam = pub["diameter_mm"] if len(pub) else pd.Series([], dtype=float)
    assert not np.isclose(diam, 1.0).any()
    at = pub[np.isclose(diam, 0.25)] if len(pub) else pub
    if len(at):
        r = at.iloc[0]
        assert not r["estimable"] and math.isnan(r["ratio"]) and "not estimable" in r["sentence"], r.to_dict()
        assert f"pooled threshold of {FEW[0]} not estimable" in r["not_estimable"]
    assert any("have an estimated threshold" in n and "1 mm" in n for n in a.notes), a.notes
    # the human/model factor leaves the not-estimable cells out
    per = pd.DataFrame(a.human_model["per_diameter"])
    assert set(per.loc[per["estimable"], "diameter_mm"]) == {0.25}
    assert per.loc[~per["estimable"], "factor"].isna().all()


def test_every_output_says_not_estimable_and_never_prints_the_number(starved, tmp_path):
    d, _, _ = starved
    out = tmp_path / "out"
    res = CliRunner().invoke(
        main,
        [
            "analyse",
            str(d / "reads.csv"),
            "--model",
            str(d / "model.csv"),
            "--n-boot",
            "100",
            "--out",
            str(out),
        ],
    )
    assert res.exit_code == 0, res.output
    # the text summary
    lines = [ln for ln in res.stdout.splitlines() if ln.startswith(FEW[0]) and " 0.25 " in f" {ln} "]
    assert lines and "not estimable (" in lines[0] and "8 trials" in lines[0], res.stdout
    # analysis.json: no threshold, the reason and the trials
    a = json.loads((out / "analysis.json").read_text())
    pooled = {(c["detector"], c["diameter_mm"]): c for c in a["curves"] if c["reader"] == "pooled"}
    for cell in (ALL_CORRECT, FEW, CHANCE):
        c = pooled[cell]
        assert c["threshold_contrast"] is None and c["ci_low"] is None and c["ci_high"] is None, c
        assert c["estimable"] is False and c["not_estimable"] and c["n_trials"] > 0
    assert pooled[GOOD]["estimable"] is True and pooled[GOOD]["threshold_contrast"] > 0
    assert a["estimability"] == {"min_trials": 10, "max_ci_ratio": 10.0, "max_contrast": 1.0}
    # no contrast anywhere in the outputs above 100 % (every threshold and CI in every curve row)
    for c in a["curves"]:
        for k in ("threshold_contrast", "ci_low", "ci_high"):
            assert c[k] is None or c[k] <= 1.0, c
    # the CSV tables: empty cells, the reason beside them
    for name in ("pooled_curves.csv", "reader_curves.csv"):
        t = pd.read_csv(out / name)
        bad = t[~t["estimable"]]
        assert len(bad) and bad["threshold_contrast"].isna().all() and bad["ci_high"].isna().all(), name
        assert bad["not_estimable"].str.len().gt(0).all() and (t["threshold_contrast"].dropna() <= 1).all()
    # the HTML report: the words in the tables and in the plot, never the fitted value of a starved cell
    page = (out / "report.html").read_text()
    assert page.count("not estimable (") >= 3 and "pooled: not estimable" in page
    assert re.search(r"not estimable \(.{0,200}?8 trials, fewer than 40", page)


def test_the_rule_on_single_rows():
    """Each reason on its own (the rule's defaults: 10 trials per reader, CI within a factor 10, ≤ 100 %)."""
    rule = EstimabilityRule()
    ok = {"threshold_contrast": 0.02, "ci_low": 0.015, "ci_high": 0.03, "n_trials": 40, "converged": True}
    assert reasons_for(ok, rule) == []
    assert reasons_for({**ok, "converged": False}, rule)[0].startswith("no interior maximum")
    assert reasons_for({**ok, "n_trials": 9}, rule) == ["9 trials, fewer than 10"]
    assert reasons_for({**ok, "n_trials": 39, "n_readers": 4}, rule) == ["39 trials, fewer than 40 (10 per reader)"]
    assert reasons_for({**ok, "ci_low": 0.001, "ci_high": 0.05}, rule) == [
        "95 % CI spans a factor of 50 (more than 10)"
    ]
    assert reasons_for({**ok, "threshold_contrast": 1.4, "ci_low": 0.9, "ci_high": 2.0}, rule) == [
        "threshold above 100 % contrast"
    ]
    assert reasons_for({**ok, "threshold_contrast": 0.5, "ci_low": 0.3, "ci_high": 1.2}, rule) == [
        "95 % CI reaches above 100 % contrast"
    ]
    assert reasons_for({**ok, "ci_low": float("nan"), "ci_high": float("nan")}, rule) == ["no confidence interval"]
    assert reasons_for({**ok, "ci_low": float("nan"), "ci_high": float("nan")}, rule, ci_expected=False) == []
    # the rule's own numbers are checked, and a table round-trips with its numbers blanked
    with pytest.raises(Exception, match="factor above 1"):
        EstimabilityRule(max_ci_ratio=0.5)
    df = judge_curves(pd.DataFrame([ok, {**ok, "n_trials": 3}]), rule)
    pub = public_curves(df)
    assert df["estimable"].tolist() == [True, False] and pub["threshold_contrast"].isna().tolist() == [False, True]
    assert df["threshold_contrast"].notna().all()  # the fitted values stay for the statistics that pool
    csv = io.StringIO(pub.to_csv(index=False))
    assert pd.read_csv(csv)["threshold_contrast"].isna().tolist() == [False, True]
