"""The headline of a two-panel comparison: the air-kerma ratio for equal threshold, pooled over detail sizes.

**Per diameter.**  From each panel's dose-series fit log C_T = α − β·(log K − x̄)
(:mod:`scorer.detector.dose`), the kerma panel B needs to reach the threshold panel A reaches at kerma K is
log K_B = x̄_B + (α_B − α_A + β_A·(log K − x̄_A))/β_B, so the log ratio at K is

    y(K) = log K_B − log K = x̄_B − log K + (α_B − α_A + β_A·(log K − x̄_A))/β_B.

At K = exp(x̄_A) this is :func:`scorer.detector.dose.kerma_ratio`'s ratio.  Its variance follows by the delta
method from the two fits' covariances (independent panels; Cramér 1946, sec. 27.7).  All diameters are
compared at the same kerma K (the geometric centre of the kermas both series cover, and their ends), so the
ratios can be pooled.  A K_B outside the kermas panel B was measured at is flagged *extrapolated*.  A
two-sided p-value per diameter (z = y/se) is adjusted across the diameters by Holm's method (Holm 1979), as
the reader-study comparison is.

**Pooled per detail class.**  The log ratios of the diameters in a class (by default ≤ 0.25 mm and
≥ 0.5 mm) are pooled by the DerSimonian–Laird random-effects estimator: weights 1/(vᵢ + τ²) with

    Q = Σ wᵢ(yᵢ − ȳ_FE)²,  wᵢ = 1/vᵢ,  τ² = max(0, (Q − (k − 1)) / (Σwᵢ − Σwᵢ²/Σwᵢ)),

the pooled estimate's standard error 1/√Σ(1/(vᵢ + τ²)) and a normal 95 % CI (DerSimonian & Laird 1986).
Heterogeneity is stated as Cochran's Q (χ² on k − 1 df under homogeneity) and I² = max(0, (Q − (k − 1))/Q),
the share of the spread not due to chance (Higgins & Thompson 2002).  Checked against
``statsmodels.stats.meta_analysis.combine_effects(method_re="dl")`` in ``tests/test_headline.py``.

**Drivers.**  What the ratio rests on, read from the two ``limen detector`` JSONs: MTF at a few
frequencies, DQE at a low and a high frequency (at the flat fields' kerma, and at the lowest kerma of the
noise series when there is one) and the electronic-noise-equivalent kerma e/q of the noise components
(:mod:`scorer.detector.noise`).  The ratio the panels' MTF, NNPS and noise components predict (Fourier NPW,
:func:`scorer.detector.dose.predicted_kerma_ratios`) is pooled per class as a geometric mean, without a CI.

References
----------
.. [1] DerSimonian, R. & Laird, N. "Meta-analysis in clinical trials", Controlled Clinical Trials 7 (1986) 177.
.. [2] Higgins, J. P. T. & Thompson, S. G. "Quantifying heterogeneity in a meta-analysis", Stat. Med. 21
       (2002) 1539.
.. [3] Holm, S. "A simple sequentially rejective multiple test procedure", Scand. J. Statist. 6 (1979).
.. [4] Cramér, H. *Mathematical Methods of Statistics* (1946) — the delta method.
"""

from __future__ import annotations

import re
from dataclasses import asdict, dataclass
from typing import Any

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy import stats

from scorer.detector.dose import PowerLawFit, predicted_kerma_ratios
from scorer.errors import LimenError

Z95 = 1.959963984540054
#: default detail classes (mm): small ≤ 0.25, large ≥ 0.5 (issue 21; common practice for micro-
#: calcification-sized and mass-sized details)
DEFAULT_DETAIL_CLASSES = "0-0.25,0.5-"
OPTION = "--detail-classes"


# ----------------------------------------------------------------------------- detail classes


@dataclass(frozen=True)
class DetailClass:
    """Diameters d with low_mm ≤ d ≤ high_mm (either bound may be open)."""

    low_mm: float | None
    high_mm: float | None

    @property
    def name(self) -> str:
        if (self.low_mm is None or self.low_mm <= 0) and self.high_mm is None:
            return "of every size"
        if self.low_mm is None or self.low_mm <= 0:
            return f"≤ {self.high_mm:g} mm"
        if self.high_mm is None:
            return f"≥ {self.low_mm:g} mm"
        return f"{self.low_mm:g}–{self.high_mm:g} mm"

    def contains(self, diameter_mm: float) -> bool:
        d = float(diameter_mm)
        return (self.low_mm is None or d >= self.low_mm - 1e-9) and (self.high_mm is None or d <= self.high_mm + 1e-9)


def parse_detail_classes(text: str | None) -> list[DetailClass]:
    """``"0-0.25,0.5-"`` → [≤ 0.25 mm, ≥ 0.5 mm]: comma-separated ranges LOW-HIGH in mm, either end open.

    Raises LimenError (naming ``--detail-classes``) for an unreadable range, an empty or reversed one, or
    two classes that overlap.
    """
    text = DEFAULT_DETAIL_CLASSES if text is None else str(text)
    out: list[DetailClass] = []
    for part in (p.strip() for p in text.split(",")):
        m = re.fullmatch(r"\s*([0-9.]*)\s*-\s*([0-9.]*)\s*", part)
        try:
            if m is None or (not m.group(1) and not m.group(2)):
                raise ValueError
            lo = float(m.group(1)) if m.group(1) else None
            hi = float(m.group(2)) if m.group(2) else None
        except ValueError:
            raise LimenError(
                f"cannot read the detail class {part!r}: write ranges in mm such as 0-0.25,0.5- (an open end "
                "is left empty)",
                OPTION,
            ) from None
        if lo is not None and hi is not None and not hi >= lo:
            raise LimenError(f"the detail class {part!r} ends below its start", OPTION)
        out.append(DetailClass(lo, hi))
    out.sort(key=lambda c: c.low_mm or 0.0)
    for a, b in zip(out, out[1:]):
        if a.high_mm is None or (b.low_mm is not None and b.low_mm <= a.high_mm):
            raise LimenError(f"the detail classes {a.name} and {b.name} overlap", OPTION)
    return out


# ----------------------------------------------------------------------------- pooling


@dataclass
class PooledEstimate:
    """A DerSimonian–Laird random-effects pooled estimate (module docstring), on the scale of the inputs."""

    estimate: float
    se: float
    ci_low: float
    ci_high: float
    k: int
    q: float  # Cochran's Q
    df: int
    p_heterogeneity: float  # P(χ²_df ≥ Q); NaN for k = 1
    i2: float  # Higgins & Thompson's I² (fraction); NaN for k = 1
    tau2: float  # between-diameter variance
    estimate_fixed: float  # inverse-variance (fixed-effect) estimate
    se_fixed: float
    weights: list[float]  # relative random-effects weights

    def to_dict(self) -> dict[str, Any]:
        return asdict(self)


def pool_random_effects(effects: ArrayLike, variances: ArrayLike) -> PooledEstimate:
    """Pool effects yᵢ with within-study variances vᵢ by DerSimonian & Laird (1986); I² of Higgins &
    Thompson (2002).  Raises ValueError for no effect or a non-positive variance."""
    y = np.asarray(effects, dtype=float)
    v = np.asarray(variances, dtype=float)
    if y.size == 0 or y.shape != v.shape:
        raise ValueError("pooling needs one variance per effect, and at least one effect")
    if not (np.all(np.isfinite(y)) and np.all(np.isfinite(v)) and np.all(v > 0)):
        raise ValueError("effects must be finite and variances finite and positive")
    w = 1.0 / v
    y_fe = float(np.sum(w * y) / np.sum(w))
    k = int(y.size)
    q = float(np.sum(w * (y - y_fe) ** 2))
    df = k - 1
    c = float(np.sum(w) - np.sum(w**2) / np.sum(w))
    tau2 = max(0.0, (q - df) / c) if df > 0 and c > 0 else 0.0
    w_re = 1.0 / (v + tau2)
    est = float(np.sum(w_re * y) / np.sum(w_re))
    se = float(1.0 / np.sqrt(np.sum(w_re)))
    return PooledEstimate(
        estimate=est,
        se=se,
        ci_low=est - Z95 * se,
        ci_high=est + Z95 * se,
        k=k,
        q=q,
        df=df,
        p_heterogeneity=float(stats.chi2.sf(q, df)) if df > 0 else float("nan"),
        i2=max(0.0, (q - df) / q) if df > 0 and q > 0 else (0.0 if df > 0 else float("nan")),
        tau2=float(tau2),
        estimate_fixed=y_fe,
        se_fixed=float(1.0 / np.sqrt(np.sum(w))),
        weights=(w_re / np.sum(w_re)).tolist(),
    )


def holm(p_values: ArrayLike) -> NDArray[np.float64]:
    """Holm-adjusted p-values (Holm 1979): sorted p₍ᵢ₎·(m − i + 1), running maximum, capped at 1; NaN stays
    NaN and does not count in m.  (statsmodels' ``multipletests`` gives the same numbers but runs a full
    garbage collection on every call, 0.15 s, which the coverage checks cannot afford.)"""
    p = np.asarray(p_values, dtype=float)
    out = np.full(p.shape, np.nan)
    idx = np.flatnonzero(np.isfinite(p))
    if idx.size:
        order = idx[np.argsort(p[idx], kind="stable")]
        m = order.size
        adj = np.maximum.accumulate(p[order] * (m - np.arange(m)))
        out[order] = np.minimum(adj, 1.0)
    return out


# ----------------------------------------------------------------------------- ratio at a common kerma


def log_ratio_at(fit_a: PowerLawFit, fit_b: PowerLawFit, kerma_ugy: float) -> tuple[float, float]:
    """(y, se): log of K_B/K at the threshold panel A reaches at ``kerma_ugy``, delta-method SE (module doc)."""
    if not fit_b.beta > 0:
        return float("nan"), float("nan")
    lk = float(np.log(kerma_ugy))
    num = fit_b.alpha - fit_a.alpha + fit_a.beta * (lk - fit_a.x_center)
    y = fit_b.x_center - lk + num / fit_b.beta
    # gradient with respect to (α_A, β_A) and (α_B, β_B)
    ga = np.array([-1.0 / fit_b.beta, (lk - fit_a.x_center) / fit_b.beta])
    gb = np.array([1.0 / fit_b.beta, -num / fit_b.beta**2])
    var = float(ga @ np.asarray(fit_a.cov) @ ga + gb @ np.asarray(fit_b.cov) @ gb)
    return float(y), float(np.sqrt(var)) if var > 0 else float("nan")


def _fits(series: dict[str, Any]) -> dict[float, PowerLawFit]:
    fits = [f for f in series.get("fits", []) if f.get("beta")]
    return {round(float(f["diameter_mm"]), 6): PowerLawFit.from_dict(f) for f in fits}


def _kerma_range(fits: dict[float, PowerLawFit]) -> tuple[float, float]:
    ks = [k for f in fits.values() for k in f.kermas_ugy]
    return (min(ks), max(ks)) if ks else (float("nan"), float("nan"))


def comparison_kermas(series_a: dict[str, Any], series_b: dict[str, Any]) -> list[float]:
    """The kermas the headline compares at: the lowest, the geometric centre and the highest kerma both
    series cover (air kerma at the detector, µGy)."""
    (lo_a, hi_a), (lo_b, hi_b) = _kerma_range(_fits(series_a)), _kerma_range(_fits(series_b))
    lo, hi = max(lo_a, lo_b), min(hi_a, hi_b)
    if not (np.isfinite(lo) and np.isfinite(hi) and hi > lo):
        raise LimenError("the two dose series share no range of air kerma: no common kerma to compare at")
    return [float(lo), float(np.sqrt(lo * hi)), float(hi)]


def per_diameter_ratios(series_a: dict[str, Any], series_b: dict[str, Any], kerma_ugy: float) -> list[dict[str, Any]]:
    """Per diameter both series fit: K_B/K_A at the threshold A reaches at ``kerma_ugy`` with a 95 % CI,
    z-test p-value and the extrapolation flag (K_B outside panel B's measured kermas)."""
    fa, fb = _fits(series_a), _fits(series_b)
    rows = []
    for d in sorted(set(fa) & set(fb)):
        y, se = log_ratio_at(fa[d], fb[d], kerma_ugy)
        ok = np.isfinite(y) and np.isfinite(se) and se > 0
        k_b = float(kerma_ugy * np.exp(y)) if np.isfinite(y) else float("nan")
        lo_b, hi_b = min(fb[d].kermas_ugy), max(fb[d].kermas_ugy)
        rows.append(
            {
                "diameter_mm": d,
                "kerma_a_ugy": float(kerma_ugy),
                "kerma_b_ugy": k_b if np.isfinite(k_b) else None,
                "log_ratio": y if ok else None,
                "se_log": se if ok else None,
                "ratio": float(np.exp(y)) if ok else None,
                "ci_low": float(np.exp(y - Z95 * se)) if ok else None,
                "ci_high": float(np.exp(y + Z95 * se)) if ok else None,
                "p_value": float(2 * stats.norm.sf(abs(y) / se)) if ok else None,
                "extrapolated": bool(np.isfinite(k_b) and not (lo_b * 0.999 <= k_b <= hi_b * 1.001)),
                "threshold_contrast": float(fa[d].threshold_at(kerma_ugy)),
                "note": "" if ok else "panel B's β is not positive: no ratio",
            }
        )
    if rows:
        adj = holm([np.nan if r["p_value"] is None else r["p_value"] for r in rows])
        for r, p in zip(rows, adj):
            r["p_holm"] = None if not np.isfinite(p) else float(p)
    return rows


# ----------------------------------------------------------------------------- the headline


def _pool_class(rows: list[dict[str, Any]]) -> tuple[PooledEstimate | None, list[dict[str, Any]]]:
    use = [r for r in rows if r["log_ratio"] is not None]
    if not use:
        return None, use
    return pool_random_effects([r["log_ratio"] for r in use], [r["se_log"] ** 2 for r in use]), use


def _fmt_ratio(r: float) -> str:
    return f"{r:.2g}" if r < 10 else f"{r:.0f}"


def class_sentence(
    name: str, pooled: dict[str, Any], la: str, lb: str, kerma_ugy: float, others: list[dict[str, Any]]
) -> str:
    """Plain sentences for a detail class, e.g. "For details ≤ 0.25 mm indirect needs 1.4× (95 % CI 1.2–1.7)
    the air kerma of direct for the same threshold. …" — who needs more, how sure, at what kerma, over which
    diameters, and the ratio at the ends of the dose series (flagged where extrapolated)."""
    r, lo, hi = pooled["ratio"], pooled["ci_low"], pooled["ci_high"]
    if r >= 1:
        more, less, shown = lb, la, (r, lo, hi)
    else:
        more, less, shown = la, lb, (1 / r, 1 / hi, 1 / lo)
    ci = f"95 % CI {_fmt_ratio(shown[1])}–{_fmt_ratio(shown[2])}"
    text = f"For details {name} {more} needs {_fmt_ratio(shown[0])}× ({ci}) the air kerma of {less} for the same "
    text += "threshold"
    text += " — no clear difference, the CI includes 1." if lo <= 1.0 <= hi else "."
    het = f", I² = {100 * pooled['i2']:.0f} %" if pooled["k"] > 1 else ""
    n = "one diameter" if pooled["k"] == 1 else f"{pooled['k']} diameters pooled{het}"
    text += f" At the threshold {la} reaches at {kerma_ugy:.3g} µGy; {n}."
    ends = [
        f"{_fmt_ratio(o['ratio'])}× at {o['kerma_ugy']:.3g} µGy"
        + (f" ({o['n_extrapolated']} of {pooled['k']} diameters extrapolated)" if o.get("extrapolated") else "")
        for o in others
        if o.get("ratio") is not None
    ]
    if ends:
        text += f" The ratio {lb} ÷ {la} is " + ", ".join(ends) + "."
    return text


def pair_conclusion(classes: list[dict[str, Any]], la: str, lb: str) -> str:
    """One line for the pair: per class who needs less air kerma where the CI allows saying so."""
    parts = []
    for c in classes:
        r, lo, hi = c["ratio"], c["ci_low"], c["ci_high"]
        if r >= 1:
            more, shown = lb, (r, lo, hi)
        else:
            more, shown = la, (1 / r, 1 / hi, 1 / lo)
        num = f"{more} needs {_fmt_ratio(shown[0])}×, 95 % CI {_fmt_ratio(shown[1])}–{_fmt_ratio(shown[2])}"
        if lo <= 1.0 <= hi:
            parts.append(f"details {c['name']}: no clear difference ({num})")
        else:
            better = la if r > 1 else lb
            parts.append(f"details {c['name']}: {better} better ({num})")
    return "; ".join(parts) + "." if parts else ""


def headline(
    series_a: dict[str, Any],
    series_b: dict[str, Any],
    labels: tuple[str, str] = ("A", "B"),
    det_a: dict[str, Any] | None = None,
    det_b: dict[str, Any] | None = None,
    classes: list[DetailClass] | None = None,
) -> dict[str, Any]:
    """The equal-quality kerma ratio B/A pooled per detail class, with its drivers (module docstring).

    ``series_a``/``series_b`` are parsed ``limen dose-series`` JSONs, ``det_a``/``det_b`` the panels'
    ``limen detector`` JSONs (for the drivers and the predicted ratio; optional).
    """
    la, lb = labels
    classes = parse_detail_classes(None) if classes is None else classes
    kermas = comparison_kermas(series_a, series_b)
    k_ref = kermas[1]
    by_kerma = {k: per_diameter_ratios(series_a, series_b, k) for k in kermas}
    rows = by_kerma[k_ref]
    notes: list[str] = []
    predicted = {}
    if det_a and det_b and rows:
        try:
            m = {
                float(p["diameter_mm"]): int(p["m_alternatives"])
                for g in series_a.get("groups", [])[:1]
                for p in g["thresholds"]
                if p.get("m_alternatives")
            } or 4
            for p in predicted_kerma_ratios(det_a, det_b, [r["diameter_mm"] for r in rows], k_ref, m_alternatives=m):
                predicted[round(p["diameter_mm"], 6)] = p["ratio"]
        except LimenError as exc:
            notes.append(f"no predicted ratio: {exc}")
    for r in rows:
        r["predicted_ratio"] = predicted.get(round(r["diameter_mm"], 6))
        r["detail_class"] = next((c.name for c in classes if c.contains(r["diameter_mm"])), None)
    out_classes = []
    for c in classes:
        members = [r for r in rows if c.contains(r["diameter_mm"])]
        pooled, used = _pool_class(members)
        if pooled is None:
            notes.append(f"details {c.name}: no diameter with a ratio in both dose series")
            continue
        entry: dict[str, Any] = {
            "name": c.name,
            "low_mm": c.low_mm,
            "high_mm": c.high_mm,
            "diameters_mm": [r["diameter_mm"] for r in used],
            "kerma_ugy": k_ref,
            "log_ratio": pooled.estimate,
            "se_log": pooled.se,
            "ratio": float(np.exp(pooled.estimate)),
            "ci_low": float(np.exp(pooled.ci_low)),
            "ci_high": float(np.exp(pooled.ci_high)),
            "p_value": float(2 * stats.norm.sf(abs(pooled.estimate) / pooled.se)),
            "k": pooled.k,
            "q": pooled.q,
            "df": pooled.df,
            "p_heterogeneity": pooled.p_heterogeneity,
            "i2": pooled.i2,
            "tau2": pooled.tau2,
            "fixed_effect_ratio": float(np.exp(pooled.estimate_fixed)),
            "weights": pooled.weights,
            "n_extrapolated": sum(1 for r in used if r["extrapolated"]),
            "pooling": "random effects, DerSimonian–Laird (1986); I² of Higgins & Thompson (2002)",
        }
        preds = [r["predicted_ratio"] for r in used if r.get("predicted_ratio")]
        entry["predicted_ratio"] = float(np.exp(np.mean(np.log(preds)))) if preds else None
        others = []
        for k in (kermas[0], kermas[2]):
            sub = [r for r in by_kerma[k] if c.contains(r["diameter_mm"])]
            p2, used2 = _pool_class(sub)
            others.append(
                {
                    "kerma_ugy": k,
                    "ratio": None if p2 is None else float(np.exp(p2.estimate)),
                    "ci_low": None if p2 is None else float(np.exp(p2.ci_low)),
                    "ci_high": None if p2 is None else float(np.exp(p2.ci_high)),
                    "i2": None if p2 is None else p2.i2,
                    "extrapolated": any(r["extrapolated"] for r in used2),
                    "n_extrapolated": sum(1 for r in used2 if r["extrapolated"]),
                }
            )
        entry["other_kermas"] = others
        if entry["ci_low"] <= 1.0 <= entry["ci_high"]:
            entry["verdict"] = "no clear difference"
        else:
            entry["verdict"] = f"{lb if entry['ratio'] > 1 else la} needs more air kerma"
        entry["sentence"] = class_sentence(c.name, entry, la, lb, k_ref, others)
        out_classes.append(entry)
    adj = holm([c["p_value"] for c in out_classes])
    for done, p in zip(out_classes, adj):
        done["p_holm_classes"] = float(p)
    unclassed = [r["diameter_mm"] for r in rows if r["detail_class"] is None]
    if unclassed:
        notes.append(f"diameters in no class (shown per diameter only): {', '.join(f'{d:g}' for d in unclassed)} mm")
    drivers = panel_drivers(det_a, det_b, la, lb, kermas[0]) if det_a and det_b else None
    return {
        "labels": [la, lb],
        "observer": series_a.get("observer"),
        "method": series_a.get("method"),
        "kermas_ugy": kermas,
        "reference_kerma_ugy": k_ref,
        "definition": f"ratio = air kerma {lb} needs / air kerma {la} needs for the same threshold contrast, at "
        f"the threshold {la} reaches at the stated kerma; > 1: {la} needs less",
        "classes": out_classes,
        "sentences": [c["sentence"] for c in out_classes],
        "conclusion": pair_conclusion(out_classes, la, lb),
        "per_diameter": rows,
        "per_diameter_other_kermas": {f"{k:.6g}": by_kerma[k] for k in (kermas[0], kermas[2])},
        "multiplicity": f"per-diameter p-values Holm-adjusted across the {len(rows)} diameters (Holm 1979), as "
        "on the reader-study page; the class p-values across the classes",
        "drivers": drivers,
        "driver_sentences": driver_sentences(drivers, la, lb) if drivers else [],
        "why": driver_line(drivers, la, lb) if drivers else "",
        "short_labels": list(short_labels(drivers, la, lb)),
        "notes": notes,
    }


# ----------------------------------------------------------------------------- drivers


def _interp(curve: dict[str, Any] | None, f: float, key: str = "value") -> float | None:
    if not curve or curve.get(key) is None:
        return None
    x = np.asarray(curve["frequency_per_mm"], dtype=float)
    y = np.asarray([np.nan if v is None else v for v in curve[key]], dtype=float)
    if not (x.min() - 1e-9 <= f <= x.max() + 1e-9):
        return None
    v = float(np.interp(f, x, y))
    return v if np.isfinite(v) else None


def driver_frequencies(det_a: dict[str, Any], det_b: dict[str, Any]) -> tuple[list[float], float, float]:
    """MTF frequencies (1, 2 /mm and ~70 % of the lower Nyquist), the low (0.5 /mm) and the high DQE
    frequency (~70 % of the lower Nyquist, rounded to 0.5 /mm)."""
    nyq = min(float(d.get("nyquist_per_mm") or 5.0) for d in (det_a, det_b))
    high = max(1.0, np.floor(0.7 * nyq * 2) / 2)
    return sorted({1.0, 2.0, high}), 0.5, float(high)


def panel_drivers(
    det_a: dict[str, Any], det_b: dict[str, Any], la: str, lb: str, low_kerma_ugy: float | None = None
) -> dict[str, Any]:
    """MTF, DQE at a low and a high frequency and the electronic-noise kerma of both panels."""
    freqs, f_low, f_high = driver_frequencies(det_a, det_b)
    out: dict[str, Any] = {
        "mtf_frequencies_per_mm": freqs,
        "dqe_low_per_mm": f_low,
        "dqe_high_per_mm": f_high,
        "panels": {},
    }
    for lab, det in ((la, det_a), (lb, det_b)):
        mtf = det.get("mtf")
        dqe = det.get("dqe")
        p = {
            "panel_type": (det.get("panel") or {}).get("type"),
            "nyquist_per_mm": det.get("nyquist_per_mm"),
            "mtf": {f"{f:g}": _interp(mtf, f) for f in freqs},
            "mtf_nyquist": _interp(mtf, float(det.get("nyquist_per_mm") or np.nan))
            if det.get("nyquist_per_mm")
            else None,
            "dqe_kerma_ugy": det.get("kerma_ugy"),
            "dqe_low": _interp(dqe, f_low),
            "dqe_low_ci": [_interp(dqe, f_low, "ci_low"), _interp(dqe, f_low, "ci_high")],
            "dqe_high": _interp(dqe, f_high),
            "dqe_high_ci": [_interp(dqe, f_high, "ci_low"), _interp(dqe, f_high, "ci_high")],
            "dqe_above_1": bool(any(v is not None and v > 1 for v in (_interp(dqe, f_low), _interp(dqe, f_high)))),
            "electronic_kerma_ugy": None,
            "electronic_kerma_ci": None,
            "low_kerma_dqe": None,
        }
        ns = det.get("noise_series") or {}
        comp = ns.get("components") or {}
        ql = comp.get("quantum_limited") or {}
        if ql.get("low_ugy") is not None:
            p["electronic_kerma_ugy"] = ql["low_ugy"]
            p["electronic_kerma_ci"] = ql.get("low_ci")
        groups = [g for g in ns.get("groups") or [] if g.get("dqe")]
        if groups:
            g = min(groups, key=lambda g: g["kerma_ugy"])
            p["low_kerma_dqe"] = {
                "kerma_ugy": g["kerma_ugy"],
                "dqe_low": _interp(g["dqe"], f_low),
                "dqe_high": _interp(g["dqe"], f_high),
            }
        out["panels"][lab] = p
    return out


def short_labels(drivers: dict[str, Any] | None, la: str, lb: str) -> tuple[str, str]:
    """The panels' types ("direct", "indirect") where they tell the two apart, else their labels."""
    if drivers:
        ta, tb = (drivers["panels"][lab].get("panel_type") for lab in (la, lb))
        if ta and tb and ta != tb:
            return ta, tb
    return la, lb


def driver_line(drivers: dict[str, Any], la: str, lb: str) -> str:
    """The drivers in one line, values as "panel A / panel B" (short names)."""
    na, nb = short_labels(drivers, la, lb)
    pa, pb = drivers["panels"][la], drivers["panels"][lb]
    fh, fl = drivers["dqe_high_per_mm"], drivers["dqe_low_per_mm"]

    def two(a: float | None, b: float | None, fmt: str = ".2f") -> str | None:
        return None if a is None or b is None else f"{format(a, fmt)} / {format(b, fmt)}"

    parts = []
    mtf = two(pa["mtf"].get(f"{fh:g}"), pb["mtf"].get(f"{fh:g}"))
    if mtf:
        parts.append(f"MTF at {fh:g} /mm {mtf}")
    dl, dh = two(pa["dqe_low"], pb["dqe_low"]), two(pa["dqe_high"], pb["dqe_high"])
    if dl and dh:
        parts.append(f"DQE at {fl:g} /mm {dl}, at {fh:g} /mm {dh}")
    low_a, low_b = pa.get("low_kerma_dqe"), pb.get("low_kerma_dqe")
    if low_a and low_b and two(low_a.get("dqe_high"), low_b.get("dqe_high")):
        parts.append(
            f"at {low_a['kerma_ugy']:g} µGy {two(low_a.get('dqe_low'), low_b.get('dqe_low'))} and "
            f"{two(low_a['dqe_high'], low_b['dqe_high'])}"
        )
    e = two(pa["electronic_kerma_ugy"], pb["electronic_kerma_ugy"], ".2g")
    if e:
        parts.append(f"electronic noise equals quantum noise at {e} µGy")
    return f"{na} / {nb}: " + "; ".join(parts) + "." if parts else ""


def driver_sentences(drivers: dict[str, Any], la: str, lb: str) -> list[str]:
    """Plain statements of the measured values behind the ratio (no claim beyond them)."""
    pa, pb = drivers["panels"][la], drivers["panels"][lb]
    fh, fl = drivers["dqe_high_per_mm"], drivers["dqe_low_per_mm"]
    out = []
    na, nb = short_labels(drivers, la, lb)

    def pair(a: float, b: float, fmt: str = "{:.2f}") -> str:
        return f"{fmt.format(a)} ({na}) vs {fmt.format(b)} ({nb})"

    ma, mb = pa["mtf"].get(f"{fh:g}"), pb["mtf"].get(f"{fh:g}")
    if ma is not None and mb is not None:
        out.append(f"Sharpness, what small details depend on most: MTF at {fh:g} /mm {pair(ma, mb)}.")
    if pa["dqe_high"] is not None and pb["dqe_high"] is not None:
        txt = f"DQE at {fh:g} /mm (small details): {pair(pa['dqe_high'], pb['dqe_high'])} at the flat fields' kerma"
        la_low, lb_low = pa.get("low_kerma_dqe"), pb.get("low_kerma_dqe")
        if la_low and lb_low and la_low.get("dqe_high") is not None and lb_low.get("dqe_high") is not None:
            txt += f"; {pair(la_low['dqe_high'], lb_low['dqe_high'])} at {la_low['kerma_ugy']:g} µGy"
        out.append(txt + ".")
    if pa["dqe_low"] is not None and pb["dqe_low"] is not None:
        txt = f"DQE at {fl:g} /mm (large details): {pair(pa['dqe_low'], pb['dqe_low'])}"
        la_low, lb_low = pa.get("low_kerma_dqe"), pb.get("low_kerma_dqe")
        if la_low and lb_low and la_low.get("dqe_low") is not None and lb_low.get("dqe_low") is not None:
            txt += f"; {pair(la_low['dqe_low'], lb_low['dqe_low'])} at {la_low['kerma_ugy']:g} µGy"
        out.append(txt + ".")
    ea, eb = pa["electronic_kerma_ugy"], pb["electronic_kerma_ugy"]
    if ea is not None and eb is not None:
        out.append(
            f"Electronic noise equals quantum noise (pixel variance) at {pair(ea, eb, '{:.2g} µGy')}: below about "
            "ten times that kerma it lowers the DQE, most at high frequencies on a panel whose quantum noise is "
            "spread by light."
        )
    return out
