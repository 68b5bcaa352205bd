"""Baselines and control charts for nightly thresholds: the statistics behind the alerts.

Thresholds are compared on a log scale (log10 of the threshold contrast): their confidence
intervals are multiplicative, and a fixed fractional change is the same step at every diameter.

* **Baseline** per detector, method and diameter from its first K sessions (or sessions chosen
  explicitly): mean m of log10 C_T, and a standard deviation σ = max(s_between, s_within), where
  s_between is the sample SD over the baseline sessions and s_within the median standard error of
  one session's log10 C_T (from its 95 % CI).  With K as small as 3–5 the sample SD alone is too
  uncertain to set control limits (its relative standard error is ≈ 1/√(2(K−1)), 35 % at K = 5),
  and a run of near-equal baseline sessions would otherwise give limits narrower than a session's
  own noise.  (Common practice for control charts on short baselines; our choice of floor.)
* **Baseline rule**: the session is worse than baseline by more than the configured fraction f
  *beyond its CI*: the lower CI bound exceeds 10^m · (1 + f).
* **Shewhart rule**: |x − m| > L √(σ_x² + σ²/K), x = log10 C_T, L = 3, σ_x = max(σ, SE of this
  session's own log10 C_T).  — Shewhart individuals chart, Montgomery, *Introduction to Statistical
  Quality Control*, 6th ed. (2009), §6.4 (from memory); the σ²/K term is the variance of a mean of K
  baseline sessions (the usual prediction-interval width s·√(1 + 1/K)), without which a baseline of
  3–5 sessions raises false alarms far more often than the nominal 0.27 %; the σ_x floor keeps a
  session whose own CI is wide (a failed fit, fewer usable images) from being called out of control
  by its own noise.
* **EWMA rule**: z_t = λ x_t + (1 − λ) z_(t−1), z_0 = m, over the sessions after the baseline in
  date order; alert when |z_t − m| > L σ √(λ/(2−λ) · (1 − (1−λ)^(2t)) + 1/K).  — Roberts,
  Technometrics 1 (1959); Montgomery §9.2, eq. 9.22–9.26; λ = 0.2 with L near 3 is a usual choice
  (Lucas & Saccucci, Technometrics 32 (1990)) (from memory); + 1/K as above (z − m also carries the
  baseline mean's error, which the EWMA does not average away).
* **Limits rule**: the threshold fails the configured limits (``scorer.observer.evaluate``).

Each alert says which way the threshold moved: ``worse`` (higher threshold contrast) or
``better`` (lower; a sudden improvement also deserves a look: a changed dose or processing).
"""

from __future__ import annotations

from dataclasses import asdict, dataclass

import numpy as np
import pandas as pd
from scipy import stats

Z95 = float(stats.norm.ppf(0.975))


@dataclass
class Alert:
    detector: str
    session_id: int
    session_date: str
    method: str
    diameter_mm: float
    rule: str  # baseline | shewhart | ewma | limits
    direction: str  # worse | better
    value: float | None  # the session's threshold contrast (ewma: the EWMA's value, as a contrast)
    reference: float | None  # baseline threshold, control limit or acceptable limit (contrast)
    message: str

    def to_dict(self) -> dict:
        return asdict(self)


def log_se_from_ci(ci_low, ci_high, level: float = 0.95):
    """Standard error of log10 C from a two-sided CI, treating the CI as normal in log C."""
    z = float(stats.norm.ppf(0.5 + level / 2))
    lo, hi = np.asarray(ci_low, float), np.asarray(ci_high, float)
    with np.errstate(divide="ignore", invalid="ignore"):
        return (np.log10(hi) - np.log10(lo)) / (2 * z)


def compute_baseline(history: pd.DataFrame) -> pd.DataFrame:
    """Baseline per diameter from the sessions in ``history``.

    Parameters
    ----------
    history : one row per session and diameter: session_id, diameter_mm, threshold_contrast,
        ci_low, ci_high.

    Returns
    -------
    DataFrame with diameter_mm, mean_log10, sigma_log10, sd_between_log10, se_within_log10,
    n_sessions (diameters with fewer than two finite thresholds are left out).
    """
    rows = []
    for d, g in history.groupby("diameter_mm"):
        c = g["threshold_contrast"].to_numpy(float)
        ok = np.isfinite(c) & (c > 0)
        if ok.sum() < 2:
            continue
        x = np.log10(c[ok])
        sd = float(np.std(x, ddof=1))
        se = log_se_from_ci(g["ci_low"].to_numpy(float)[ok], g["ci_high"].to_numpy(float)[ok])
        se = se[np.isfinite(se)]
        se_w = float(np.median(se)) if se.size else 0.0
        rows.append(
            {
                "diameter_mm": float(d),
                "mean_log10": float(x.mean()),
                "sigma_log10": max(sd, se_w),
                "sd_between_log10": sd,
                "se_within_log10": se_w,
                "n_sessions": int(ok.sum()),
            }
        )
    return pd.DataFrame(
        rows, columns=["diameter_mm", "mean_log10", "sigma_log10", "sd_between_log10", "se_within_log10", "n_sessions"]
    )


def ewma(x, lam: float, start: float) -> np.ndarray:
    """z_t = λ x_t + (1 − λ) z_(t−1), z_0 = ``start`` (Roberts 1959)."""
    z, out = float(start), []
    for v in np.asarray(x, float):
        z = lam * v + (1 - lam) * z
        out.append(z)
    return np.asarray(out)


def ewma_sigma_factor(lam: float, t) -> np.ndarray:
    """SD of z_t in units of σ for independent x: √(λ/(2−λ) · (1 − (1−λ)^(2t))) (Montgomery eq. 9.25)."""
    t = np.asarray(t, float)
    return np.sqrt(lam / (2 - lam) * (1 - (1 - lam) ** (2 * t)))


def shewhart_halfwidth(sigma: float, n_baseline: int, rules, se_session: float = 0.0) -> float:
    """L √(σ_x² + σ²/K), σ_x = max(σ, this session's SE) (log10 units)."""
    sx = max(sigma, se_session if np.isfinite(se_session) else 0.0)
    return rules.control_sigma * float(np.sqrt(sx**2 + sigma**2 / max(n_baseline, 1)))


def ewma_halfwidth(sigma: float, n_baseline: int, rules, t: int) -> float:
    """L σ √(λ/(2−λ)(1 − (1−λ)^(2t)) + 1/K) (log10 units)."""
    f = float(ewma_sigma_factor(rules.ewma_lambda, t))
    return rules.ewma_width * sigma * float(np.sqrt(f**2 + 1 / max(n_baseline, 1)))


def control_limits(baseline_row, rules, t_after: int | None = None) -> dict:
    """Shewhart (and, for the t-th session after the baseline, EWMA) limits as contrasts (for plots)."""
    m, s, k = baseline_row["mean_log10"], baseline_row["sigma_log10"], int(baseline_row["n_sessions"])
    w = shewhart_halfwidth(s, k, rules)
    out = {"baseline": 10**m, "shewhart_low": 10 ** (m - w), "shewhart_high": 10 ** (m + w)}
    if t_after:
        w = ewma_halfwidth(s, k, rules, t_after)
        out.update(ewma_low=10 ** (m - w), ewma_high=10 ** (m + w))
    return out


def _pct(c) -> str:
    return f"{100 * c:.3g} %"


def pct_pair(value: float, reference: float, digits: int = 3) -> tuple[str, str]:
    """Both contrasts as percentages with enough significant digits that the printed numbers compare as the
    true ones do ("1.1604 % is outside the control limit 1.1597 %", never "1.16 % … 1.16 %")."""
    a, b = 100 * float(value), 100 * float(reference)
    for n in range(digits, 13):
        fa, fb = f"{a:.{n}g}", f"{b:.{n}g}"
        if (float(fa) > float(fb)) == (a > b) and (float(fa) < float(fb)) == (a < b):
            return f"{fa} %", f"{fb} %"
    return f"{a!r} %", f"{b!r} %"


def _limits_wording(r, c, d, method, human_factor) -> tuple:
    """(value, reference, message) of a failed limit: the human-equivalent threshold that was compared."""
    acc = getattr(r, "acceptable", None)
    acc = float(acc) if acc is not None and np.isfinite(acc) else None
    h = getattr(r, "compared_contrast", None)
    h = float(h) if h is not None and np.isfinite(h) else None
    if h is None or not np.isfinite(c) or c <= 0 or np.isclose(h, c, rtol=1e-12):
        v = c if h is None else h
        v_s, a_s = pct_pair(v, acc) if acc is not None else (_pct(v), "")
        return v, acc, f"threshold contrast {v_s} fails the acceptable limit {a_s}".rstrip()
    from scorer.observer.limits import HumanFactor, human_equivalent

    factor = h / c
    f_txt = f"factor {factor:.3g}"
    ci_txt = ""
    hf = human_factor if isinstance(human_factor, HumanFactor) else None
    if hf is not None:
        try:
            hf = hf.for_method(method).at(d)
        except Exception:  # a factor of another method: print the stored one only
            hf = None
    if hf is not None and hf.has_ci and np.isclose(hf.value, factor, rtol=1e-6):
        f_txt += f" (95 % CI {hf.ci_low:.3g}–{hf.ci_high:.3g})"
        lo, hi = getattr(r, "ci_low", None), getattr(r, "ci_high", None)
        if lo is not None and hi is not None:
            _, lo_h, hi_h = human_equivalent(c, float(lo), float(hi), hf)
            if np.isfinite(lo_h) and np.isfinite(hi_h):
                ci_txt = f", 95 % CI {100 * lo_h:.3g}–{100 * hi_h:.3g} %"
    h_s, a_s = pct_pair(h, acc) if acc is not None else (_pct(h), "")
    msg = (
        f"human-equivalent threshold contrast {h_s} (model {_pct(c)} × human/model {f_txt}{ci_txt}) fails the "
        f"acceptable limit {a_s} for human readers"
    ).replace(" for human readers", " for human readers" if a_s else "")
    return h, acc, msg


def evaluate_session(
    detector: str,
    session_id: int,
    history: pd.DataFrame,
    baseline: pd.DataFrame | None,
    baseline_last: tuple[str, int] | None,
    baseline_ids: set,
    rules,
    human_factor=None,
) -> list[Alert]:
    """Alerts for one session of one detector and method.

    Parameters
    ----------
    history : every scored session of the detector for this method, the one judged included:
        session_id, session_date, diameter_mm, threshold_contrast, ci_low, ci_high, verdict.
    baseline : from :func:`compute_baseline` (None: only the limits rule applies).
    baseline_last : (session_date, session_id) of the last baseline session; the EWMA runs over
        the sessions after it.
    baseline_ids : sessions that form the baseline (they are not judged against it).
    rules : :class:`scorer.qc.config.AlertRules`.
    human_factor : the detector's :class:`~scorer.observer.limits.HumanFactor` (or number), for the CI of the
        human-equivalent threshold the limits rule prints; the stored ``compared_contrast`` is what failed.
    """
    alerts: list[Alert] = []
    cur = history[history["session_id"] == session_id]
    if cur.empty:
        return alerts
    date = str(cur["session_date"].iloc[0])
    method = str(cur["method"].iloc[0]) if "method" in cur else ""
    base = {} if baseline is None else {round(float(r.diameter_mm), 6): r for r in baseline.itertuples()}
    order = history.drop_duplicates("session_id")[["session_id", "session_date"]].sort_values(
        ["session_date", "session_id"]
    )
    after = (
        []
        if baseline_last is None
        else [
            int(r.session_id)
            for r in order.itertuples()
            if (str(r.session_date), int(r.session_id)) > (str(baseline_last[0]), int(baseline_last[1]))
            and int(r.session_id) not in baseline_ids
        ]
    )
    judged = baseline is not None and session_id not in baseline_ids
    values = dates = None
    for r in cur.itertuples():
        d = float(r.diameter_mm)
        c = float(r.threshold_contrast) if r.threshold_contrast is not None else np.nan
        where = f"{detector} {date}, {d:g} mm ({method})"

        def add(rule, direction, value, reference, message, d=d, where=where) -> None:
            alerts.append(
                Alert(
                    detector,
                    session_id,
                    date,
                    method,
                    d,
                    rule,
                    direction,
                    None if value is None or not np.isfinite(value) else float(value),
                    None if reference is None else float(reference),
                    f"{where}: {message}",
                )
            )

        if "limits" in rules.rules and getattr(r, "verdict", None) == "fail":
            add("limits", "worse", *_limits_wording(r, c, d, method, human_factor))
        b = base.get(round(d, 6))
        if not judged or b is None or not (np.isfinite(c) and c > 0):
            continue
        m, s, k = float(b.mean_log10), float(b.sigma_log10), int(b.n_sessions)
        x = np.log10(c)
        ref = 10**m
        if "baseline" in rules.rules:
            lo = float(r.ci_low) if r.ci_low is not None and np.isfinite(r.ci_low) else c
            if lo > ref * (1 + rules.worse_fraction):
                lo_s, bound_s = pct_pair(lo, ref * (1 + rules.worse_fraction))
                add(
                    "baseline",
                    "worse",
                    c,
                    ref,
                    f"threshold contrast {_pct(c)} (95 % CI from {lo_s}) is more than {100 * rules.worse_fraction:g} % "
                    f"above the baseline {_pct(ref)}: its CI starts above {bound_s}",
                )
        se = float(log_se_from_ci(r.ci_low, r.ci_high)) if r.ci_low is not None and r.ci_high is not None else 0.0
        w = shewhart_halfwidth(s, k, rules, se if np.isfinite(se) else 0.0)
        if "shewhart" in rules.rules and s > 0 and abs(x - m) > w:
            direction = "worse" if x > m else "better"
            lim = 10 ** (m + np.sign(x - m) * w)
            c_s, lim_s = pct_pair(c, lim)
            add(
                "shewhart",
                direction,
                c,
                lim,
                f"threshold contrast {c_s} is outside the {rules.control_sigma:g} σ control limit {lim_s} "
                f"(baseline {_pct(ref)})",
            )
        if "ewma" in rules.rules and s > 0 and session_id in after:
            if values is None:  # (session, diameter) → threshold, built once per call: re-evaluating a year of
                # sessions after a baseline change stays O(n²) dictionary look-ups, not O(n³) frame filters
                values = {
                    (int(a), round(float(b), 6)): float(c)
                    for a, b, c in zip(history["session_id"], history["diameter_mm"], history["threshold_contrast"])
                }
                dates = {int(a): str(b) for a, b in zip(order["session_id"], order["session_date"])}
            seq = [sid for sid in after if (dates[sid], sid) <= (date, session_id)]
            xs = []
            for sid in seq:
                v = values.get((sid, round(d, 6)), np.nan)
                if np.isfinite(v) and v > 0:
                    xs.append(np.log10(v))
            if not xs:
                continue
            z = ewma(xs, rules.ewma_lambda, m)[-1]
            w = ewma_halfwidth(s, k, rules, len(xs))
            if abs(z - m) > w:
                direction = "worse" if z > m else "better"
                lim = 10 ** (m + np.sign(z - m) * w)
                z_s, lim_s = pct_pair(10**z, lim)
                add(
                    "ewma",
                    direction,
                    10**z,
                    lim,
                    f"EWMA of threshold contrast {z_s} after {len(xs)} session(s) is outside its "
                    f"control limit {lim_s} (baseline {_pct(ref)})",
                )
    return alerts
