"""Two detectors side by side: MTF, NNPS, DQE, predicted and scored threshold contrast, in plain words.

Used by ``limen compare-detectors`` (and the web app); reads the JSON written by
``limen detector`` and ``limen score``."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np

from scorer.errors import LimenError
from scorer.detector.predict import predict_from_detector

#: diameters (mm) used when neither --diameters, --layout nor a scored JSON gives any (common practice)
DEFAULT_DIAMETERS_MM = (0.1, 0.25, 0.5, 1.0, 2.0)
#: relative difference below which two values are called similar
SIMILAR = 0.03


def _load_json(path, what: str) -> dict:
    p = Path(path)
    try:
        data = json.loads(p.read_text(encoding="utf-8"))
    except OSError as exc:
        raise LimenError(f"cannot read {what} ({exc.strerror or exc})", p) from None
    except ValueError as exc:
        raise LimenError(f"not valid JSON: {exc}", p) from None
    if not isinstance(data, dict):
        raise LimenError(f"not a {what} (expected a JSON object)", p)
    return data


def load_detector_json(path) -> dict:
    d = _load_json(path, "detector JSON")
    if not any(d.get(k) for k in ("mtf", "nnps", "dqe")):
        raise LimenError("no MTF, NNPS or DQE in this file: is it a 'limen detector' JSON?", path)
    return d


def load_scored_json(path) -> list[dict]:
    """Thresholds from a ``limen score --json`` output (key "thresholds")."""
    d = _load_json(path, "score JSON")
    rows = d.get("thresholds")
    if not isinstance(rows, list) or not rows:
        raise LimenError("no 'thresholds' list in this score JSON", path)
    out = []
    for i, r in enumerate(rows):
        try:
            out.append({"diameter_mm": float(r["diameter_mm"]),
                        "threshold_contrast": None if r.get("threshold_contrast") is None
                        else float(r["threshold_contrast"]),
                        "ci_low": r.get("ci_low"), "ci_high": r.get("ci_high"),
                        "method": r.get("method"), "n_images": r.get("n_images"),
                        "m_alternatives": None if r.get("m_alternatives") is None else int(r["m_alternatives"]),
                        "observer": r.get("observer") or d.get("observer")})
        except (KeyError, TypeError, ValueError):
            raise LimenError(f"thresholds[{i}] lacks a numeric diameter_mm/threshold_contrast", path) from None
    return out


def _at(curve: dict | None, f: float, key: str = "value"):
    if not curve or f is None:
        return None
    x = np.asarray(curve["frequency_per_mm"], dtype=float)
    y = np.asarray(curve[key], dtype=float)
    if f < x.min() - 1e-9 or f > x.max() + 1e-9:
        return None
    return float(np.interp(f, x, y))


def _better(va, vb, higher_is_better: bool, la: str, lb: str) -> str:
    if va is None or vb is None or not np.isfinite(va) or not np.isfinite(vb):
        return ""
    if abs(va - vb) <= SIMILAR * max(abs(va), abs(vb)):
        return "similar"
    a_wins = (va > vb) if higher_is_better else (va < vb)
    return la if a_wins else lb


def compare(a: dict, b: dict, labels=("A", "B"), diameters_mm=None, scored_a=None, scored_b=None,
            m_alternatives: int | dict[float, int] | None = None) -> dict:
    """Side-by-side table, threshold rows and a plain-language summary of two detector JSONs.

    ``m_alternatives``: the M of the criterion for predicted thresholds, one for all diameters or per
    diameter; by default each diameter's M in the scored results (so predicted and scored thresholds use
    the same criterion), else 4.
    """
    la, lb = labels
    table: list[dict] = []
    wins: dict[str, list[tuple[str, str]]] = {}

    def row(quantity, va, vb, higher, group, point=""):
        better = _better(va, vb, higher, la, lb)
        table.append({"quantity": quantity, la: va, lb: vb, "better": better})
        if better:
            wins.setdefault(group, []).append((point, better))

    for f in (1.0, 2.0, 5.0):
        row(f"MTF at {f:g} cycles/mm", _at(a.get("mtf"), f), _at(b.get("mtf"), f), True, "MTF", f"{f:g} cycles/mm")
    row("MTF at own Nyquist", _at(a.get("mtf"), a.get("nyquist_per_mm")), _at(b.get("mtf"), b.get("nyquist_per_mm")),
        True, "MTF", "Nyquist")
    table.append({"quantity": "Nyquist frequency (cycles/mm)", la: a.get("nyquist_per_mm"),
                  lb: b.get("nyquist_per_mm"), "better": ""})
    for f in (0.5, 2.0):
        row(f"NNPS at {f:g} cycles/mm (mm²)", _at(a.get("nnps"), f, "value_mm2"), _at(b.get("nnps"), f, "value_mm2"),
            False, "NNPS", f"{f:g} cycles/mm")
    table.append({"quantity": "air kerma of the flat fields (µGy)", la: a.get("kerma_ugy"), lb: b.get("kerma_ugy"),
                  "better": ""})
    for f in (0.5, 2.0):
        row(f"DQE at {f:g} cycles/mm", _at(a.get("dqe"), f), _at(b.get("dqe"), f), True, "DQE", f"{f:g} cycles/mm")

    thresholds: list[dict] = []
    diam = list(diameters_mm) if diameters_mm else None
    if diam is None:
        ds = sorted({r["diameter_mm"] for r in (scored_a or []) + (scored_b or [])})
        diam = ds or list(DEFAULT_DIAMETERS_MM)
    if m_alternatives is None:
        m_alternatives = {float(r["diameter_mm"]): int(r["m_alternatives"]) for r in (scored_a or []) + (scored_b or [])
                          if r.get("m_alternatives")} or 4
    pred = {}
    for label, det in ((la, a), (lb, b)):
        try:
            pred[label] = predict_from_detector(det, diam, m_alternatives=m_alternatives)
        except LimenError:
            pred[label] = []
        for p in pred[label]:
            thresholds.append({"detector": label, "source": f"predicted {p.observer.upper()}",
                               "diameter_mm": p.diameter_mm, "threshold_contrast": p.threshold_contrast,
                               "ci_low": None, "ci_high": None})
    for label, sc in ((la, scored_a), (lb, scored_b)):
        for r in sc or []:
            obs = (r.get("observer") or "").upper()
            thresholds.append({"detector": label, "source": f"scored {obs}".strip(), "diameter_mm": r["diameter_mm"],
                               "threshold_contrast": r["threshold_contrast"], "ci_low": r.get("ci_low"),
                               "ci_high": r.get("ci_high")})
    # threshold rows in the side-by-side table (lower is better)
    sources = sorted({t["source"] for t in thresholds})
    for src in sources:
        for d in diam if src.startswith("predicted") else sorted({t["diameter_mm"] for t in thresholds
                                                                   if t["source"] == src}):
            va = next((t["threshold_contrast"] for t in thresholds
                       if t["detector"] == la and t["source"] == src and np.isclose(t["diameter_mm"], d)), None)
            vb = next((t["threshold_contrast"] for t in thresholds
                       if t["detector"] == lb and t["source"] == src and np.isclose(t["diameter_mm"], d)), None)
            row(f"{src} threshold contrast at {d:g} mm", va, vb, False, f"{src} threshold contrast", f"{d:g} mm")

    summary = _summary(wins, la, lb)
    if a.get("kerma_ugy") and b.get("kerma_ugy") and not np.isclose(a["kerma_ugy"], b["kerma_ugy"], rtol=0.05):
        summary.append(f"The flat fields were taken at different air kermas ({a['kerma_ugy']:g} vs "
                       f"{b['kerma_ugy']:g} µGy): NNPS and predicted thresholds depend on kerma; compare DQE instead.")
    return {"labels": [la, lb], "table": table, "thresholds": thresholds, "summary": summary,
            "diameters_mm": diam,
            "m_alternatives": ({f"{k:g}": v for k, v in m_alternatives.items()} if isinstance(m_alternatives, dict)
                               else m_alternatives)}


def _summary(wins: dict[str, list[tuple[str, str]]], la: str, lb: str) -> list[str]:
    """One plain sentence per group of quantities: who is better, and where."""
    text = {"MTF": ("sharper (higher MTF)", "higher MTF"), "NNPS": ("less noisy (lower NNPS)", "lower NNPS"),
            "DQE": ("more dose-efficient (higher DQE)", "higher DQE")}
    out = []
    for group, ws in wins.items():
        whole, short = text.get(group, (f"better (lower {group})", f"lower {group}"))
        where = {lab: [p for p, w in ws if w == lab] for lab in (la, lb, "similar")}
        n = len(ws)
        if len(where[la]) == n or len(where[lb]) == n:
            who = la if len(where[la]) == n else lb
            out.append(f"{who} is {whole} at every point compared ({', '.join(p for p, _ in ws)}).")
        elif len(where["similar"]) == n:
            out.append(f"{group}: the two detectors are within {SIMILAR:.0%} of each other everywhere compared.")
        else:
            parts = [f"{lab} has the {short} at {', '.join(where[lab])}" for lab in (la, lb) if where[lab]]
            if where["similar"]:
                parts.append(f"they are within {SIMILAR:.0%} at {', '.join(where['similar'])}")
            out.append(f"{group}: " + "; ".join(parts) + ".")
    if not out:
        out.append("Nothing comparable: the two files share no measured quantity.")
    return out


