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
* agreement (:mod:`scorer.study.agreement`);
* which thresholds are estimates at all (:mod:`scorer.study.estimability`): a cell without an interior maximum,
  with too few trials, or with too wide an interval (or one reaching above 100 % contrast) is reported as not
  estimable, with its reason and trial count, never as a number.  The statistics that pool per-reader
  thresholds (between-reader CV, group comparison, Bland–Altman) keep every fit with an interior maximum, as
  before: they carry each reader's uncertainty, and dropping the widest intervals would select on noise.

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
from scorer.observer.flags import text as flag_text
from scorer.observer.flags import threshold_flags
from scorer.observer.mafc import Detectability, criterion_for, criterion_json
from scorer.resources import check_limit
from scorer.study.alternatives import criterion_at, m_alternatives_of, m_at
from scorer.study.estimability import EstimabilityRule, judge_curves, public_curves
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
    rule: EstimabilityRule = field(default_factory=EstimabilityRule)
    criterion: float | Detectability | None = None  # as given: None (default d′_T), a d′_T or a Pc

    def threshold_definition(self) -> dict:
        """d′_T (or the Pc given), Pc and d′ for each M of the study (:func:`scorer.observer.mafc.criterion_json`)."""
        ms = self.m_alternatives.values() if isinstance(self.m_alternatives, dict) else [self.m_alternatives]
        return criterion_json(self.criterion, ms)

    def public_tables(self) -> dict[str, pd.DataFrame]:
        """The curve and comparison tables as every output shows them: the numbers of a not-estimable row
        blanked (:func:`scorer.study.estimability.public_curves`), its reason and trial count kept."""
        return {
            "reader_curves": public_curves(self.reader_curves),
            "pooled_curves": public_curves(self.pooled_curves),
            "model_curves": public_curves(self.model_curves),
            "comparison": _public_comparison(self.comparison),
        }

    def curves_records(self) -> list[dict]:
        cols = ["reader", self.by, "diameter_mm", "threshold_contrast", "ci_low", "ci_high"]
        out = []
        pub = self.public_tables()
        for key in ("reader_curves", "pooled_curves", "model_curves"):
            df = pub[key]
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
                        "estimable",
                        "not_estimable",
                    )
                    if c in df.columns
                ]
                for rec in df[cols + extra + (["note"] if "note" in df.columns else [])].to_dict("records"):
                    rec["flags"] = threshold_flags(rec)
                    out.append(rec)
        return out

    def to_json(self) -> dict:
        comp = []
        table = _public_comparison(self.comparison)
        if len(table):
            for r in table.to_dict("records"):
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
                        "estimable": bool(r.get("estimable", True)),
                        "not_estimable": r.get("not_estimable", ""),
                    }
                )

        def keyed(v):
            return {f"{k:g}": x for k, x in v.items()} if isinstance(v, dict) else v

        return {
            "by": self.by,
            "m_alternatives": keyed(self.m_alternatives),
            "criterion_pc": keyed(self.criterion_pc),
            "threshold_definition": self.threshold_definition(),
            "readers": self.readers,
            "curves": self.curves_records(),
            "between_reader_cv": self.cv.to_dict("records") if len(self.cv) else [],
            "detector_comparison": comp,
            "human_model_factor": self.human_model,
            "agreement": self.agreement,
            "notes": self.notes,
            "seed": self.seed,
            "n_boot": self.n_boot,
            "estimability": self.rule.to_json(),
        }


def add_flags(df: pd.DataFrame) -> pd.DataFrame:
    """A ``flags`` column (one text cell, :mod:`scorer.observer.flags`) on a table of curves, in place."""
    if len(df):
        df["flags"] = [flag_text(threshold_flags(r)) for r in df.to_dict("records")]
    return df


def _public_comparison(comp: pd.DataFrame) -> pd.DataFrame:
    if comp is None or not len(comp) or "estimable" not in comp.columns:
        return comp
    out = comp.copy()
    bad = ~out["estimable"].astype(bool)
    for c in ("ratio", "ci_low", "ci_high", "log10_ratio", "se_log10", "p_value", "p_adjusted"):
        if c in out.columns:
            out[c] = out[c].astype(float)
            out.loc[bad, c] = np.nan
    if "sentence" in out.columns:
        out.loc[bad, "sentence"] = [
            f"{r['level']} vs {r['reference']} at {r['diameter_mm']:g} mm: not estimable ({r['not_estimable']})"
            for r in out[bad].to_dict("records")
        ]
    return out


def _judge_comparison(comp: pd.DataFrame, pooled: pd.DataFrame, by: str, rule: EstimabilityRule) -> pd.DataFrame:
    """Mark a comparison row not estimable when either group's pooled threshold at that diameter is not, or
    when the ratio's interval is missing or spans more than the rule's factor."""
    if comp is None or not len(comp):
        return comp
    bad_cells = []
    if pooled is not None and len(pooled) and "estimable" in pooled.columns:
        bad_cells = [(r[by], float(r["diameter_mm"])) for r in pooled.to_dict("records") if not r["estimable"]]
    why_all = []
    for r in comp.to_dict("records"):
        why = []
        for grp in (r["level"], r["reference"]):
            if any(g == grp and np.isclose(d, r["diameter_mm"]) for g, d in bad_cells):
                why.append(f"pooled threshold of {grp} not estimable")
        lo, hi = r.get("ci_low"), r.get("ci_high")
        if not (np.isfinite(lo) and np.isfinite(hi) and lo > 0):
            why.append("no confidence interval")
        elif hi / lo > rule.max_ci_ratio:
            why.append(f"95 % CI spans a factor of {hi / lo:.3g} (more than {rule.max_ci_ratio:g})")
        why_all.append("; ".join(why))
    out = comp.copy()
    out["not_estimable"] = why_all
    out["estimable"] = [not w for w in why_all]
    return out


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
    criterion_pc: float | Detectability | None = None,
    reference: str | None = None,
    ci: float = 0.95,
    progress=None,
    model_responses: pd.DataFrame | None = None,
    rule: EstimabilityRule | None = None,
) -> Analysis:
    """Run every analysis of a reader study; degrade with notes when the study is too small.

    ``trials`` and ``model`` must already be validated (:func:`validate_trials`).  ``model_responses``: the
    model observer's per-site responses (``limen score``'s responses table); with them the human/model factor
    is measured for the d′ method too, and ``model`` defaults to the model's decisions on them.
    ``progress`` is an optional callable(str) told which step runs.  ``rule`` says when a threshold counts as
    estimated (:class:`~scorer.study.estimability.EstimabilityRule`; its defaults when None).
    ``criterion_pc``: the threshold definition, the same as the model observer's
    (:func:`scorer.observer.mafc.criterion_for`): None for the default detectability d′_T, a
    :class:`~scorer.observer.mafc.Detectability`, or one Pc for every M.
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
        p = criterion_for(m, criterion_pc)
    if criterion_pc is not None and not isinstance(criterion_pc, Detectability):
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
    rule = rule or EstimabilityRule()
    say("per-reader fits")
    rc = judge_curves(reader_curves(trials, m, rng, n_boot, by, criterion_pc, ci), rule, ci_expected=n_boot > 0)
    n_bad = int((~rc["converged"]).sum())
    if n_bad:
        notes.append(
            f"{n_bad} per-reader threshold(s) have no interior maximum (all correct or at chance); "
            "they are bounds, not estimates"
        )
    n_ne = int((rc["converged"] & ~rc["estimable"]).sum())
    if n_ne:
        notes.append(
            f"{n_ne} of {len(rc)} per-reader threshold(s) have an interior maximum but are not estimable on their "
            "own (reasons in their rows): they are not reported, but the between-reader CV, the comparison and the "
            "Bland–Altman plot, which weigh every reader's fit with its own uncertainty, still use them (leaving "
            "out the noisiest readers would bias those statistics)"
        )
    say("pooled curves")
    pc_df, pn = pooled_curves(trials, m, by, criterion_pc, ci)
    pc_df = judge_curves(pc_df, rule)
    notes += pn
    if len(pc_df) and (~pc_df["estimable"]).any():
        cells = ", ".join(f"{r[by]} {r['diameter_mm']:g} mm" for r in pc_df[~pc_df["estimable"]].to_dict("records"))
        notes.append(f"pooled threshold not estimable for {cells} (reasons in their rows)")
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
    comp = _judge_comparison(comp, pc_df, by, rule)
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
        mc = judge_curves(model_curves(model, m, rng, n_boot, by, criterion_pc), rule, ci_expected=n_boot > 0)
        say("human/model factor")
        hm = human_model_factor(
            trials,
            model,
            m,
            rng,
            n_boot,
            by,
            criterion_pc,
            ci,
            rc,
            model_responses,
            exclude=_factor_exclusions(pc_df, mc, by),
        )
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
        rule=rule,
        criterion=criterion_pc,
    )


def _factor_exclusions(pooled: pd.DataFrame, model: pd.DataFrame, by: str) -> dict:
    """(group, diameter) → reason, for the cells whose pooled human or model threshold is not estimable."""
    out = {}
    for df, who in ((pooled, "pooled readers"), (model, "model observer")):
        if df is None or not len(df) or "estimable" not in df.columns:
            continue
        for r in df[~df["estimable"]].to_dict("records"):
            key = (r[by], float(r["diameter_mm"]))
            out[key] = "; ".join(x for x in (out.get(key), f"{who}: {r['not_estimable']}") if x)
    return out
