"""Two detectors side by side: MTF, NNPS, DQE, predicted and scored threshold contrast, in plain words.

Used by ``limen compare-detectors`` (and the web app) on the JSON written by ``limen detector``,
``limen score`` and ``limen dose-series``: :mod:`scorer.workflow` reads those files, the ``check_*``
functions here validate their parsed content (errors name the file)."""

from __future__ import annotations

import re
from collections.abc import Sequence
from typing import TYPE_CHECKING, Any

import numpy as np

from scorer.detector.predict import predict_from_detector
from scorer.errors import LimenError

if TYPE_CHECKING:
    from scorer.detector.headline import DetailClass

#: a 95 % confidence interval (low, high)
CI = tuple[float, float]

#: diameters (mm) used when neither --diameters, --layout nor a scored JSON gives any (common practice)
DEFAULT_DIAMETERS_MM = (0.1, 0.25, 0.5, 1.0, 2.0)
#: two-sided 95 % normal quantile
Z95 = 1.959963984540054
NO_CLEAR = "no clear difference"
POINT_ONLY = "point values only (no uncertainty available)"
SCORED_METHODS = ("dprime", "count")
METHOD_NAMES = {"dprime": "d′ method", "count": "count method"}


def check_detector_json(d: dict[str, Any], path: object) -> dict[str, Any]:
    """A parsed ``limen detector`` JSON, checked: MTF, NNPS or DQE present, each a sound curve."""
    if not any(d.get(k) for k in ("mtf", "nnps", "dqe")):
        raise LimenError("no MTF, NNPS or DQE in this file: is it a 'limen detector' JSON?", path)
    for key, value_key in (("mtf", "value"), ("nnps", "value_mm2"), ("dqe", "value")):
        if d.get(key) is not None:
            _check_curve(d[key], key, value_key, path)
    return d


def _number(v: object) -> bool:
    return isinstance(v, (int, float)) and not isinstance(v, bool) and bool(np.isfinite(v))


#: the keys every fitted entry of a dose-series JSON carries, each a finite number
FIT_NUMBERS = (
    "diameter_mm",
    "beta",
    "beta_ci_low",
    "beta_ci_high",
    "log_threshold_at_reference",
    "reference_kerma_ugy",
)


def check_dose_json(d: dict[str, Any], path: object) -> dict[str, Any]:
    """A parsed ``limen dose-series --json`` output, checked: "groups" and "fits" lists, at least one fitted
    diameter, and every fitted entry (one with a β) whole — finite numbers, a positive reference kerma and
    diameter, a 2 × 2 finite covariance of (α, β), the kermas it was fitted on — so a file edited or cut by
    hand is refused in one line naming the entry, never met half-way through the comparison."""
    if not isinstance(d.get("fits"), list) or not isinstance(d.get("groups"), list):
        raise LimenError("no 'fits' and 'groups' in this file: is it a 'limen dose-series' JSON?", path)
    if d.get("observer") is not None and d.get("observer") not in ("npw", "npwe"):
        raise LimenError(f"'observer' is {_short(d.get('observer'))}, not npw or npwe", path)
    n_fitted = 0
    for i, f in enumerate(d["fits"]):
        if not isinstance(f, dict):
            raise LimenError(f"fits[{i}] is not an object", path)
        if f.get("beta") is None:  # a diameter the series could not fit (not estimable): listed, not compared
            if not _number(f.get("diameter_mm")):
                raise LimenError(f"fits[{i}]: 'diameter_mm' is missing or not a finite number", path)
            continue
        for key in FIT_NUMBERS:
            if key not in f:
                raise LimenError(f"fits[{i}] lacks '{key}' (a fitted entry of a 'limen dose-series' JSON)", path)
            if not _number(f[key]):
                raise LimenError(f"fits[{i}]: '{key}' is {_short(f[key])}, not a finite number", path)
        where = f"fits[{i}] ({f['diameter_mm']:g} mm)"
        for key in ("diameter_mm", "reference_kerma_ugy"):
            if not f[key] > 0:
                raise LimenError(f"{where}: '{key}' is {f[key]:g}; it must be positive", path)
        if not f["beta_ci_low"] <= f["beta"] <= f["beta_ci_high"]:
            raise LimenError(f"{where}: 'beta' {f['beta']:g} lies outside its CI", path)
        cov = f.get("cov_alpha_beta")
        if not (
            isinstance(cov, list)
            and len(cov) == 2
            and all(isinstance(r, list) and len(r) == 2 and all(_number(v) for v in r) for r in cov)
        ):
            raise LimenError(f"{where}: 'cov_alpha_beta' must be a 2 × 2 array of finite numbers", path)
        if not (cov[0][0] >= 0 and cov[1][1] >= 0):
            raise LimenError(f"{where}: 'cov_alpha_beta' has a negative variance", path)
        ks = f.get("kermas_ugy")
        if not (isinstance(ks, list) and len(ks) >= 2 and all(_number(k) and k > 0 for k in ks)):
            raise LimenError(f"{where}: 'kermas_ugy' must list the two or more positive kermas it was fitted on", path)
        n_fitted += 1
    if not n_fitted:
        raise LimenError("holds no fitted diameter (no β in 'fits'): nothing to compare", path)
    for i, g in enumerate(d["groups"]):
        rows = g.get("thresholds") if isinstance(g, dict) else None
        if not isinstance(rows, list) or any(
            not isinstance(t, dict) or not _number(t.get("diameter_mm")) or not _number(t.get("m_alternatives", 2))
            for t in rows
        ):
            raise LimenError(f"groups[{i}] lacks a 'thresholds' list of diameters and M", path)
    return d


def check_dose_pair(a: dict[str, Any], b: dict[str, Any], path_a: object, path_b: object) -> None:
    """Two checked dose series that can be compared: the same model observer and threshold method (NPW against
    NPWE, or d′ against count thresholds, would give a kerma ratio of two observers), and a fitted diameter in
    common."""
    for key, what in (("observer", "model observer"), ("method", "threshold method")):
        va, vb = a.get(key), b.get(key)
        if va is not None and vb is not None and va != vb:
            raise LimenError(
                f"scored with the {str(vb).upper()} {what}, but --dose-a ({path_a}) with {str(va).upper()}: "
                f"compare series of the same {what}",
                path_b,
            )

    def fitted(d: dict[str, Any]) -> set[float]:
        return {round(float(f["diameter_mm"]), 6) for f in d["fits"] if f.get("beta") is not None}

    if not fitted(a) & fitted(b):
        da, db = (", ".join(f"{x:g}" for x in sorted(fitted(d))) for d in (a, b))
        raise LimenError(f"no fitted diameter in common with --dose-a ({path_a}): {da} mm there, {db} mm here", path_b)


def _short(v: object) -> str:
    from scorer.errors import short_text

    return short_text(repr(v) if isinstance(v, str) else v, 60)


def _check_curve(curve: object, key: str, value_key: str, path: object) -> None:
    """A curve of a detector JSON: ``frequency_per_mm`` and ``value_key`` lists of numbers (null allowed for a
    missing point), equally long, frequencies finite and increasing, at least two finite values."""
    if not isinstance(curve, dict):
        raise LimenError(f"'{key}' must be an object with frequency_per_mm and {value_key}", path)
    arrays = {}
    for name in ("frequency_per_mm", value_key):
        raw = curve.get(name)
        if not isinstance(raw, list) or not raw:
            raise LimenError(f"'{key}' lacks a '{name}' list", path)
        if any(isinstance(v, bool) or not (v is None or isinstance(v, (int, float))) for v in raw):
            raise LimenError(f"'{key}.{name}' holds something other than numbers", path)
        arrays[name] = np.array([np.nan if v is None else v for v in raw], dtype=float)
    f, v = arrays["frequency_per_mm"], arrays[value_key]
    if len(f) != len(v):
        raise LimenError(f"'{key}' has {len(f)} frequencies but {len(v)} values", path)
    if not np.all(np.isfinite(f)) or np.any(np.diff(f) <= 0):
        raise LimenError(f"'{key}.frequency_per_mm' must be finite and increasing", path)
    if np.isfinite(v).sum() < 2:
        raise LimenError(f"'{key}.{value_key}' has fewer than two finite values", path)


def scored_thresholds(d: dict[str, Any], path: object) -> list[dict[str, Any]]:
    """Thresholds from a parsed ``limen score --json`` output (key "thresholds")."""
    rows = d.get("thresholds")
    if not isinstance(rows, list) or not rows:
        raise LimenError("no 'thresholds' list in this score JSON", path)
    out = []
    for i, r in enumerate(rows):
        try:
            out.append(
                {
                    "diameter_mm": float(r["diameter_mm"]),
                    "threshold_contrast": None
                    if r.get("threshold_contrast") is None
                    else float(r["threshold_contrast"]),
                    "ci_low": r.get("ci_low"),
                    "ci_high": r.get("ci_high"),
                    "method": r.get("method"),
                    "n_images": r.get("n_images"),
                    "m_alternatives": None if r.get("m_alternatives") is None else int(r["m_alternatives"]),
                    "observer": r.get("observer") or d.get("observer"),
                }
            )
        except (KeyError, TypeError, ValueError):
            raise LimenError(f"thresholds[{i}] lacks a numeric diameter_mm/threshold_contrast", path) from None
    return out


def _at(curve: dict[str, Any] | None, f: float | None, key: str = "value") -> float | None:
    if not curve or f is None or key not in curve or curve[key] is None:
        return None
    x = np.asarray(curve["frequency_per_mm"], dtype=float)
    y = np.asarray(curve[key], dtype=float)
    if f < x.min() - 1e-9 or f > x.max() + 1e-9:
        return None
    return float(np.interp(f, x, y))


def _curve_ci(curve: dict[str, Any] | None, f: float | None, value: float | None) -> tuple[float, float] | None:
    """95 % CI of a curve at f: from its ``ci_low``/``ci_high`` arrays, or (NNPS) its relative standard error."""
    if not curve or value is None:
        return None
    lo, hi = _at(curve, f, "ci_low"), _at(curve, f, "ci_high")
    if lo is not None and hi is not None:
        return lo, hi
    rel = curve.get("relative_uncertainty")
    if isinstance(rel, (int, float)) and np.isfinite(rel) and rel > 0:
        return value * (1 - Z95 * rel), value * (1 + Z95 * rel)
    return None


def decide(
    va: float | None,
    vb: float | None,
    ci_a: CI | None,
    ci_b: CI | None,
    higher_is_better: bool,
    la: str,
    lb: str,
) -> tuple[str, str]:
    """Which detector is better at one point, and on what basis.

    Only non-overlapping 95 % confidence intervals make a difference; overlapping ones give
    "no clear difference"; without an interval on both sides no claim is made (the basis says so).
    """
    if va is None or vb is None or not np.isfinite(va) or not np.isfinite(vb):
        return "", ""
    if ci_a is None or ci_b is None or not all(np.isfinite(v) for v in (*ci_a, *ci_b)):
        return "", POINT_ONLY
    if ci_a[1] < ci_b[0] or ci_b[1] < ci_a[0]:
        a_wins = (va > vb) if higher_is_better else (va < vb)
        return (la if a_wins else lb), "95 % CIs do not overlap"
    return NO_CLEAR, "95 % CIs overlap"


def compare(
    a: dict[str, Any],
    b: dict[str, Any],
    labels: tuple[str, str] = ("A", "B"),
    diameters_mm: Sequence[float] | None = None,
    scored_a: list[dict[str, Any]] | None = None,
    scored_b: list[dict[str, Any]] | None = None,
    m_alternatives: int | dict[float, int] | None = None,
    scored_method: str = "dprime",
    dose_a: dict[str, Any] | None = None,
    dose_b: dict[str, Any] | None = None,
    detail_classes: str | list[DetailClass] | None = None,
) -> dict[str, Any]:
    """Side-by-side table, threshold rows and a plain-language summary of two detector JSONs.

    ``m_alternatives``: the M of the criterion for predicted thresholds, one for all diameters or per
    diameter; by default each diameter's M in the scored results (so predicted and scored thresholds use
    the same criterion), else 4.  ``scored_method`` ("dprime" or "count") chooses which scoring method's
    thresholds enter the side-by-side table and the summary; both are listed and plotted, each under its
    own label.  A detector is called better at a point only where the two 95 % CIs do not overlap.
    ``dose_a``/``dose_b`` (``limen dose-series`` JSONs) add the kerma each panel needs for the same threshold
    (:func:`scorer.detector.dose.compare_series`) under ``equal_quality``, and the headline — that ratio
    pooled per detail class (``detail_classes``: :func:`scorer.detector.headline.parse_detail_classes`) with
    its drivers (:func:`scorer.detector.headline.headline`) — under ``headline``.  Each label carries its
    panel's type (direct / indirect, from the detector JSON's DICOM Detector Type) unless it names it already.
    """
    if scored_method not in SCORED_METHODS:
        raise LimenError(f"unknown scoring method {scored_method!r}; choose dprime or count", "--scored-method")
    types = [panel_type(a), panel_type(b)]
    la, lb = (typed_label(lab, t) for lab, t in zip(labels, types))
    table: list[dict[str, Any]] = []
    points: dict[str, list[tuple[str, str, str, float, float]]] = {}

    def row(
        quantity: str,
        va: float | None,
        vb: float | None,
        higher: bool,
        group: str,
        point: str = "",
        ci_a: CI | None = None,
        ci_b: CI | None = None,
    ) -> None:
        better, basis = decide(va, vb, ci_a, ci_b, higher, la, lb)
        if group == "DQE" and any(v is not None and v > 1 for v in (va, vb)):
            basis = (basis + "; " if basis else "") + DQE_ABOVE_1
        table.append(
            {
                "quantity": quantity,
                la: va,
                lb: vb,
                f"{la} 95% CI": list(ci_a) if ci_a else None,
                f"{lb} 95% CI": list(ci_b) if ci_b else None,
                "better": better,
                "basis": basis,
                "higher_is_better": higher,
            }
        )
        if va is not None and vb is not None:
            points.setdefault(group, []).append((point, better, basis, va, vb))

    for f in (1.0, 2.0, 5.0):
        va, vb = _at(a.get("mtf"), f), _at(b.get("mtf"), f)
        row(
            f"MTF at {f:g} cycles/mm",
            va,
            vb,
            True,
            "MTF",
            f"{f:g} cycles/mm",
            _curve_ci(a.get("mtf"), f, va),
            _curve_ci(b.get("mtf"), f, vb),
        )
    na, nb = a.get("nyquist_per_mm"), b.get("nyquist_per_mm")
    va, vb = _at(a.get("mtf"), na), _at(b.get("mtf"), nb)
    row(
        "MTF at own Nyquist",
        va,
        vb,
        True,
        "MTF",
        "Nyquist",
        _curve_ci(a.get("mtf"), na, va),
        _curve_ci(b.get("mtf"), nb, vb),
    )
    table.append({"quantity": "Nyquist frequency (cycles/mm)", la: na, lb: nb, "better": "", "basis": ""})
    for f in (0.5, 2.0):
        va, vb = _at(a.get("nnps"), f, "value_mm2"), _at(b.get("nnps"), f, "value_mm2")
        row(
            f"NNPS at {f:g} cycles/mm (mm²)",
            va,
            vb,
            False,
            "NNPS",
            f"{f:g} cycles/mm",
            _curve_ci(a.get("nnps"), f, va),
            _curve_ci(b.get("nnps"), f, vb),
        )
    table.append(
        {
            "quantity": "air kerma of the flat fields (µGy)",
            la: a.get("kerma_ugy"),
            lb: b.get("kerma_ugy"),
            "better": "",
            "basis": "",
        }
    )
    for f in (0.5, 2.0):
        va, vb = _at(a.get("dqe"), f), _at(b.get("dqe"), f)
        row(
            f"DQE at {f:g} cycles/mm",
            va,
            vb,
            True,
            "DQE",
            f"{f:g} cycles/mm",
            _curve_ci(a.get("dqe"), f, va),
            _curve_ci(b.get("dqe"), f, vb),
        )

    thresholds: list[dict[str, Any]] = []
    diam = list(diameters_mm) if diameters_mm else None
    if diam is None:
        ds = sorted({r["diameter_mm"] for r in (scored_a or []) + (scored_b or [])})
        diam = ds or list(DEFAULT_DIAMETERS_MM)
    if m_alternatives is None:
        m_alternatives = {
            float(r["diameter_mm"]): int(r["m_alternatives"])
            for r in (scored_a or []) + (scored_b or [])
            if r.get("m_alternatives")
        } or 4
    pred = {}
    for label, det in ((la, a), (lb, b)):
        try:
            pred[label] = predict_from_detector(det, diam, m_alternatives=m_alternatives)
        except LimenError:
            pred[label] = []
        for p in pred[label]:
            thresholds.append(
                {
                    "detector": label,
                    "source": f"predicted {p.observer.upper()}",
                    "diameter_mm": p.diameter_mm,
                    "threshold_contrast": p.threshold_contrast,
                    "ci_low": None,
                    "ci_high": None,
                    "method": "predicted",
                    "observer": p.observer,
                }
            )
    for label, sc in ((la, scored_a), (lb, scored_b)):
        for r in sc or []:
            obs = (r.get("observer") or "").upper()
            method = r.get("method") or "dprime"
            thresholds.append(
                {
                    "detector": label,
                    "source": scored_source(obs, method),
                    "diameter_mm": r["diameter_mm"],
                    "threshold_contrast": r["threshold_contrast"],
                    "ci_low": r.get("ci_low"),
                    "ci_high": r.get("ci_high"),
                    "method": method,
                    "observer": r.get("observer"),
                    "censored": r.get("censored"),
                    "extrapolated": r.get("extrapolated"),
                }
            )
    # threshold rows in the side-by-side table (lower is better): predicted, and the chosen scoring method
    sources = sorted({t["source"] for t in thresholds if t["method"] in ("predicted", scored_method)})
    for src in sources:
        for d in (
            diam
            if src.startswith("predicted")
            else sorted({t["diameter_mm"] for t in thresholds if t["source"] == src})
        ):
            ta = next(
                (
                    t
                    for t in thresholds
                    if t["detector"] == la and t["source"] == src and np.isclose(t["diameter_mm"], d)
                ),
                None,
            )
            tb = next(
                (
                    t
                    for t in thresholds
                    if t["detector"] == lb and t["source"] == src and np.isclose(t["diameter_mm"], d)
                ),
                None,
            )

            def ci(t: dict[str, Any] | None) -> CI | None:
                return (
                    None
                    if t is None or t.get("ci_low") is None or t.get("ci_high") is None
                    else (float(t["ci_low"]), float(t["ci_high"]))
                )

            row(
                f"{src} threshold contrast at {d:g} mm",
                None if ta is None else ta["threshold_contrast"],
                None if tb is None else tb["threshold_contrast"],
                False,
                f"{src} threshold contrast",
                f"{d:g} mm",
                ci(ta),
                ci(tb),
            )

    summary = _summary(points, la, lb)
    if a.get("kerma_ugy") and b.get("kerma_ugy") and not np.isclose(a["kerma_ugy"], b["kerma_ugy"], rtol=0.05):
        summary.append(
            f"The flat fields were taken at different air kermas ({a['kerma_ugy']:g} vs "
            f"{b['kerma_ugy']:g} µGy): NNPS and predicted thresholds depend on kerma; compare DQE instead."
        )
    equal = None
    if dose_a is not None and dose_b is not None:
        from scorer.detector.dose import compare_series

        equal = compare_series(dose_a, dose_b, (la, lb), a, b)
    head = None
    if dose_a is not None and dose_b is not None:
        from scorer.detector.headline import headline, parse_detail_classes

        classes = detail_classes if isinstance(detail_classes, list) else parse_detail_classes(detail_classes)
        try:
            head = headline(dose_a, dose_b, (la, lb), a, b, classes)
        except LimenError as exc:
            head = {"error": str(exc), "classes": [], "sentences": []}
    noise = {lab: (det.get("noise_series") or {}) for lab, det in ((la, a), (lb, b)) if det.get("noise_series")}
    return {
        "labels": [la, lb],
        "panel_types": {la: types[0], lb: types[1]},
        "simulated": simulated_inputs({la: a, lb: b}, {la: dose_a, lb: dose_b}),
        "headline": head,
        "table": table,
        "thresholds": thresholds,
        "summary": summary,
        "equal_quality": equal,
        "noise_components": {
            lab: {"components": n.get("components"), "quantum_limited_text": n.get("quantum_limited_text")}
            for lab, n in noise.items()
        },
        "diameters_mm": diam,
        "scored_method": scored_method,
        "m_alternatives": (
            {f"{k:g}": v for k, v in m_alternatives.items()} if isinstance(m_alternatives, dict) else m_alternatives
        ),
    }


DQE_ABOVE_1 = "DQE above 1 — not physical: check the kerma, q and the conversion function (flagged)"


SIMULATOR = "Limen simulation"  # the Manufacturer Limen's simulator writes into its DICOM files


def simulated_inputs(detectors: dict[str, dict[str, Any]], series: dict[str, dict[str, Any] | None]) -> str | None:
    """A sentence naming the inputs made by Limen's simulator (flats and edges by their DICOM Manufacturer,
    dose-series images by their count), or None when none was."""
    parts = []
    for lab, det in detectors.items():
        what = []
        if ((det or {}).get("panel") or {}).get("manufacturer") == SIMULATOR:
            what.append("flat fields and edges")
        groups = (series.get(lab) or {}).get("groups") or []
        n_sim = sum(int(g.get("n_simulated") or 0) for g in groups)
        if n_sim:
            n_all = sum(int(g.get("n_images") or 0) for g in groups)
            what.append(f"{n_sim} of {n_all} dose-series image(s)")
        if what:
            parts.append(f"{lab}: {' and '.join(what)}")
    if not parts:
        return None
    return "Made by Limen's physics simulator, not by an X-ray unit — " + "; ".join(parts) + "."


def panel_type(det: dict[str, Any]) -> str | None:
    """ "direct" / "indirect" (…) from a detector JSON's ``panel`` block (DICOM Detector Type), else None."""
    return (det.get("panel") or {}).get("type")


def typed_label(label: str, kind: str | None) -> str:
    """The label with the panel's type beside it, unless it names the type already."""
    if not kind or re.search(rf"(?<![a-z]){re.escape(kind.lower())}(?![a-z])", label.lower()):
        return label
    return f"{label} ({kind})"


def scored_source(observer: str, method: str) -> str:
    """Label of a scored threshold series: observer and scoring method, never one without the other."""
    return f"scored {observer} ({METHOD_NAMES.get(method, method)})".replace("scored  (", "scored (")


def _summary(points: dict[str, list[tuple[str, str, str, float, float]]], la: str, lb: str) -> list[str]:
    """One plain sentence per group of quantities: who is better where the 95 % CIs allow saying so."""
    text = {
        "MTF": ("sharper (higher MTF)", "higher MTF", "higher"),
        "NNPS": ("less noisy (lower NNPS)", "lower NNPS", "lower"),
        "DQE": ("more dose-efficient (higher DQE)", "higher DQE", "higher"),
    }
    out = []
    for group, ps in points.items():
        whole, short, word = text.get(group, (f"better (lower {group})", f"lower {group}", "lower"))
        if all(basis == POINT_ONLY for _, _, basis, _, _ in ps):
            # no uncertainty: describe the measured values, claim nothing
            higher = word == "higher"
            where = {
                la: [p for p, _, _, va, vb in ps if (va > vb) == higher and va != vb],
                lb: [p for p, _, _, va, vb in ps if (vb > va) == higher and va != vb],
            }
            parts = [f"{lab} {word} at {', '.join(where[lab])}" for lab in (la, lb) if where[lab]]
            out.append(
                f"{group} (measured values; no uncertainty available, so no claim of a difference): "
                + "; ".join(parts)
                + "."
            )
            continue
        where = {lab: [p for p, w, _, _, _ in ps if w == lab] for lab in (la, lb, NO_CLEAR)}
        unknown = [p for p, w, basis, _, _ in ps if basis == POINT_ONLY]
        n = len(ps)
        if len(where[la]) == n or len(where[lb]) == n:
            who = la if len(where[la]) == n else lb
            out.append(
                f"{who} is {whole} at every point compared, with non-overlapping 95 % CIs "
                f"({', '.join(p for p, *_ in ps)})."
            )
        elif len(where[NO_CLEAR]) == n:
            out.append(f"{group}: no clear difference (the 95 % CIs overlap everywhere compared).")
        else:
            parts = [f"{lab} has the {short} at {', '.join(where[lab])}" for lab in (la, lb) if where[lab]]
            if where[NO_CLEAR]:
                parts.append(f"no clear difference (95 % CIs overlap) at {', '.join(where[NO_CLEAR])}")
            if unknown:
                parts.append(f"no CI to compare at {', '.join(unknown)}")
            out.append(f"{group}: " + "; ".join(parts) + ".")
    if not out:
        out.append("Nothing comparable: the two files share no measured quantity.")
    return out
