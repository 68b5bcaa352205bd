"""Reader-study analysis as one call (:func:`analyse_study`) and its result (:class:`Analysis`): per-reader
and pooled contrast-detail curves, human/model factor, detector comparison, agreement.

Input is the tidy trial table (one row per trial; columns in :data:`scorer.study.trials.TRIAL_COLUMNS`, plus
the optional :data:`scorer.study.trials.OPTIONAL_COLUMNS`), checked by
:func:`scorer.study.trials.validate_trials`.  Model-observer trials from ``limen score --out`` have the same
shape with ``reader`` = the observer's name.

Methods (each documented, with its references, where it is computed):

* per reader × group × diameter (:mod:`scorer.study.reader_fits`): ML fit of the linear-observer M-AFC
  psychometric function (:mod:`scorer.observer.psychometric`), threshold at the scorer's criterion, percentile
  bootstrap CI resampling images within the reader (Efron & Tibshirani 1993);
* pooled curve (:mod:`scorer.study.pooled_gee`): a GEE with reader clusters (Liang & Zeger 1986; statsmodels
  GEE) whose mean is the M-AFC linear-observer function through a custom link;
* between-reader CV of thresholds, with the within-reader sampling variance removed
  (:func:`scorer.study.reader_fits.between_reader_cv`);
* human/model factor (:mod:`scorer.study.human_factor`): ratio of pooled human to model thresholds per threshold
  method (count method from the model's trials; d′ method from its responses), CI by a bootstrap over readers and
  images drawn once per resample for every cell; its dependence on diameter tested; Bland & Altman (1986)
  agreement on log thresholds;
* group comparison (detector B vs A; :mod:`scorer.study.group_comparison`): linear mixed model on log10
  per-reader thresholds with reader random intercepts (statsmodels MixedLM), Holm-adjusted p-values (Holm 1979);
* agreement (:mod:`scorer.study.agreement`).

References
----------
.. [1] Liang, K.-Y. & Zeger, S. L. "Longitudinal data analysis using generalized linear
       models", Biometrika 73 (1986).
.. [2] Mancl, L. A. & DeRouen, T. A. "A covariance estimator for GEE with improved
       small-sample properties", Biometrics 57 (2001).
.. [3] Bland, J. M. & Altman, D. G. Lancet (1986).
.. [4] Holm, S. "A simple sequentially rejective multiple test procedure",
       Scand. J. Statist. 6 (1979).
.. [5] Efron, B. & Tibshirani, R. J. *An Introduction to the Bootstrap* (1993).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from scorer.errors import LimenError
from scorer.observer.flags import text as flag_text, threshold_flags
from scorer.observer.mafc import halfway_criterion
from scorer.resources import check_limit
from scorer.study.alternatives import criterion_at, m_alternatives_of, m_at
from scorer.study.group_comparison import compare_groups
from scorer.study.human_factor import human_model_factor
from scorer.study.pooled_gee import pooled_curves
from scorer.study.reader_fits import between_reader_cv, model_curves, reader_curves


@dataclass
class Analysis:
    """All results of :func:`analyse_study` (tables as DataFrames, the rest as plain dicts)."""

    by: str
    m_alternatives: int | dict[float, int]  # one M for the study, or one per diameter
    criterion_pc: float | dict[float, float]
    readers: list
    reader_curves: pd.DataFrame
    pooled_curves: pd.DataFrame
    model_curves: pd.DataFrame
    cv: pd.DataFrame
    comparison: pd.DataFrame
    human_model: dict | None
    agreement: dict
    notes: list = field(default_factory=list)
    seed: int | None = None
    n_boot: int = 0

    def curves_records(self) -> list[dict]:
        cols = ["reader", self.by, "diameter_mm", "threshold_contrast", "ci_low", "ci_high"]
        out = []
        for df in (self.reader_curves, self.pooled_curves, self.model_curves):
            if len(df):
                extra = [
                    c
                    for c in (
                        "n_trials",
                        "n_images",
                        "n_readers",
                        "converged",
                        "censored",
                        "offered_min",
                        "offered_max",
                    )
                    if c in df.columns
                ]
                for rec in df[cols + extra + (["note"] if "note" in df.columns else [])].to_dict("records"):
                    rec["flags"] = threshold_flags(rec)
                    out.append(rec)
        return out

    def to_json(self) -> dict:
        comp = []
        if len(self.comparison):
            for r in self.comparison.to_dict("records"):
                comp.append(
                    {
                        self.by if self.by != "detector" else "detector": r["level"],
                        "reference": r["reference"],
                        "diameter_mm": r["diameter_mm"],
                        "ratio": r["ratio"],
                        "ci_low": r["ci_low"],
                        "ci_high": r["ci_high"],
                        "p_value": r["p_value"],
                        "p_adjusted": r["p_adjusted"],
                        "n_readers": r["n_readers"],
                        "method": r["method"],
                        "sentence": r["sentence"],
                    }
                )

        def keyed(v):
            return {f"{k:g}": x for k, x in v.items()} if isinstance(v, dict) else v

        return {
            "by": self.by,
            "m_alternatives": keyed(self.m_alternatives),
            "criterion_pc": keyed(self.criterion_pc),
            "readers": self.readers,
            "curves": self.curves_records(),
            "between_reader_cv": self.cv.to_dict("records") if len(self.cv) else [],
            "detector_comparison": comp,
            "human_model_factor": self.human_model,
            "agreement": self.agreement,
            "notes": self.notes,
            "seed": self.seed,
            "n_boot": self.n_boot,
        }


def add_flags(df: pd.DataFrame) -> pd.DataFrame:
    """A ``flags`` column (one text cell, :mod:`scorer.observer.flags`) on a table of curves, in place."""
    if len(df):
        df["flags"] = [flag_text(threshold_flags(r)) for r in df.to_dict("records")]
    return df


def bootstrap_block(trials: pd.DataFrame, model: pd.DataFrame | None, by: str, n_methods: int = 1) -> tuple[int, str]:
    """The most bootstrap cells one resample holds at once in :func:`analyse_study`, and where.

    A cell is one number per resample that stays in memory while a group × diameter is refitted.  Per group ×
    diameter every resample holds its draw counts, one per image (:func:`bootstrap_weights`: each reader's
    images, the human/model factor's image draw, the model's) and one per reader (the factor's crossed reader
    draw), and its resampled counts per reader × contrast level (the image-sampling variance of a comparison
    between groups refits every reader's curve in each resample at once).  With a model-observer table the
    human/model factor draws the readers and every group's images once per resample and keeps those draws, and
    keeps per group × diameter the readers' resampled slope and one estimate per threshold method (two with the
    model's responses) until it forms the overall factor.  The block is the largest images + readers + readers ×
    levels over the group × diameter pairs, plus those stored draws and estimates.  Each cell costs about 20
    bytes measured with tracemalloc (correct and trial counts, and their floating-point copies for the fit;
    tests/test_stats.py).

    The likelihood grid of the fits is not counted: :func:`~scorer.observer.mafc_fast.fit_k_batch` evaluates
    it in chunks of at most :data:`~scorer.observer.mafc_fast.GRID_CHUNK_CELLS` cells (about 30 MB)
    whatever the number of resamples.
    """
    best, where = 0, ""
    pairs = trials.groupby([by, "diameter_mm"], sort=True)
    for (grp, diam), g in pairs:
        levels = set(g["contrast"].unique())
        images = g["image"].nunique()
        if model is not None:
            gm = model[(model[by] == grp) & np.isclose(model["diameter_mm"], diam)]
            levels |= set(gm["contrast"].unique())
            images = max(images, gm["image"].nunique())
        n_readers = g["reader"].nunique()
        size = images + n_readers + n_readers * len(levels)
        if size > best:
            best = int(size)
            where = (
                f"draws of {images} images and {n_readers} readers, counts of {n_readers} readers × "
                f"{len(levels)} contrast levels, {by} {grp} at {float(diam):g} mm"
            )
    if model is not None and pairs.ngroups:
        images = sum(
            len(set(trials.loc[trials[by] == g, "image"]) | set(model.loc[model[by] == g, "image"]))
            for g in trials[by].unique()
        )
        kept = images + trials["reader"].nunique() + (1 + n_methods) * int(pairs.ngroups)
        best += kept
        where += (
            f"; the human/model factor's shared draws ({images} images, {trials['reader'].nunique()} readers) and "
            f"{(1 + n_methods) * pairs.ngroups} stored estimates ({by} × diameter)"
        )
    return best, where


def analyse_study(
    trials: pd.DataFrame,
    model: pd.DataFrame | None = None,
    *,
    by: str = "detector",
    n_boot: int = 1000,
    seed: int | None = 0,
    criterion_pc: float | None = None,
    reference: str | None = None,
    ci: float = 0.95,
    progress=None,
    model_responses: pd.DataFrame | None = None,
) -> Analysis:
    """Run every analysis of a reader study; degrade with notes when the study is too small.

    ``trials`` and ``model`` must already be validated (:func:`validate_trials`).  ``model_responses``: the
    model observer's per-site responses (``limen score``'s responses table); with them the human/model factor
    is measured for the d′ method too, and ``model`` defaults to the model's decisions on them.
    ``progress`` is an optional callable(str) told which step runs.
    """
    if model is None and model_responses is not None:
        from scorer.observer.npw import decide

        model = decide(model_responses)
    from scorer.study.agreement import agreement_summary

    if by not in trials.columns:
        raise LimenError(f"--by column {by!r} is not in the trial table")
    if model is not None and by not in model.columns:
        raise LimenError(f"--by column {by!r} is not in the model-observer table")
    say = progress or (lambda s: None)
    if n_boot > 0:
        # the draws and resampled counts are allocated per group × diameter inside the fits (the likelihood grid
        # in chunks of bounded size); refuse before any of them
        block, where = bootstrap_block(trials, model, by, 1 if model_responses is None else 2)
        check_limit(
            "LIMEN_MAX_BOOTSTRAP_CELLS",
            n_boot * block,
            f"--n-boot {n_boot} resamples × {block} cells each ({where}) = {n_boot * block} cells held at once",
            "--n-boot",
        )
    rng = np.random.default_rng(seed)
    m = m_alternatives_of(trials)
    if model is not None:
        m_model = m_alternatives_of(model, "model responses")
        for d in sorted(set(trials["diameter_mm"]) & set(model["diameter_mm"])):
            if m_at(m_model, d) != m_at(m, d):
                raise LimenError(
                    f"model-observer table has {m_at(m_model, d)} alternatives per target at {d:g} mm "
                    f"but the readers' has {m_at(m, d)}",
                    "--model",
                )
    if isinstance(m, dict):
        p = {d: criterion_at(m, d, criterion_pc) for d in m}
    else:
        p = halfway_criterion(m) if criterion_pc is None else float(criterion_pc)
    if criterion_pc is not None:
        for d in sorted(set(trials["diameter_mm"])):
            md = m_at(m, d)
            if not 1.0 / md < criterion_pc < 1.0:
                raise LimenError(
                    f"{criterion_pc:g} must lie between chance (1/{md} for {md}-AFC at {d:g} mm) and 1", "--criterion"
                )
    notes = []
    if "source" in trials.columns and trials["source"].astype(str).str.contains("simulated").any():
        notes.append(
            "Simulated readers: these trials come from Limen's documented observer model "
            "(scorer/study/reader_model.py), not from people; the figures illustrate the method only."
        )
    say("per-reader fits")
    rc = reader_curves(trials, m, rng, n_boot, by, criterion_pc, ci)
    n_bad = int((~rc["converged"]).sum())
    if n_bad:
        notes.append(
            f"{n_bad} per-reader threshold(s) have no interior maximum (all correct or at chance); "
            "they are bounds, not estimates"
        )
    say("pooled curves")
    pc_df, pn = pooled_curves(trials, m, by, criterion_pc, ci)
    notes += pn
    cv = between_reader_cv(rc, by)
    if cv.empty:
        n_r = trials["reader"].nunique()
        notes.append(
            "between-reader CV needs at least 2 readers"
            if n_r < 2
            else f"between-reader CV needs at least 2 of the {n_r} readers with an estimated threshold (not a "
            "bound) at one diameter"
        )
    say(f"{by} comparison")
    comp, cn = compare_groups(rc, by, reference, ci, trials=trials, m=m, n_boot=n_boot, rng=rng)
    if len(comp) and n_boot < 2:
        notes.append(
            f"{by} comparison without the image-sampling variance (needs bootstrap resamples): "
            "its CIs are too narrow when all readers read the same images"
        )
    notes += cn
    mc = pd.DataFrame()
    hm = None
    if model is not None:
        say("model observer")
        mc = model_curves(model, m, rng, n_boot, by, criterion_pc)
        say("human/model factor")
        hm = human_model_factor(trials, model, m, rng, n_boot, by, criterion_pc, ci, rc, model_responses)
        if hm:
            for entry in hm.get("by_method", {}).values():
                if entry.get("n_excluded"):
                    notes.append(
                        f"human/model factor ({entry['method_label']}): {entry['n_excluded']} of {entry['n_cells']} "
                        f"{by} × diameter cells left out (fit at a search bound or not estimable)"
                        + ("" if entry.get("factor") is not None else "; no factor: it would rest on no cell")
                    )
    for df in (rc, pc_df, mc):
        add_flags(df)
    say("agreement")
    agr = agreement_summary(trials, by)
    notes += agr.get("notes", [])
    return Analysis(
        by=by,
        m_alternatives=m,
        criterion_pc=p,
        readers=sorted(trials["reader"].unique().tolist()),
        reader_curves=rc,
        pooled_curves=pc_df,
        model_curves=mc,
        cv=cv,
        comparison=comp,
        human_model=hm,
        agreement=agr,
        notes=notes,
        seed=seed,
        n_boot=n_boot,
    )
