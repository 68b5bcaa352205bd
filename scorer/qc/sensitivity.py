"""The smallest change of threshold contrast the configured alert rules can detect, per diameter.

From a baseline's own scatter (σ, the median within-session SE, K sessions; :mod:`scorer.qc.control`)
and the rules' settings, the rise of C_T at which a session lying exactly at the changed value
crosses each rule's limit — detected with probability about one half; a change twice as far beyond
the limit (in σ units) is detected almost always:

* Shewhart: 10^(L √(σ² + σ²/K)) (the session's own SE taken as at most σ);
* baseline rule: the CI's lower end above (1 + f)·baseline: (1 + f) · 10^(z₉₇.₅ · SE_within);
* EWMA, for a sustained shift, once z_t has settled: 10^(L σ √(λ/(2 − λ) + 1/K)) (Montgomery,
  *Introduction to Statistical Quality Control*, 6th ed. (2009), §9.2, eq. 9.26, from memory).

The kerma equivalent uses the Rose model, C_T ∝ K_a^(−1/2) (Rose, J. Opt. Soc. Am. 38 (1948)): a
threshold ratio r corresponds to a kerma fall of 1 − 1/r².  A quantum-limited panel follows it; where
electronic or structure noise matters (small discs, low dose), thresholds rise faster and the kerma
figure is conservative.
"""

from __future__ import annotations

from collections.abc import Hashable, Iterable, Mapping
from typing import TYPE_CHECKING, Any

import numpy as np
import pandas as pd
from scipy import stats

from scorer.qc.control import ewma_halfwidth, shewhart_halfwidth

if TYPE_CHECKING:
    from scorer.qc.config import AlertRules


Z975 = float(stats.norm.ppf(0.975))


def detectable_change(baseline: pd.DataFrame, rules: AlertRules) -> pd.DataFrame:
    """Per diameter: the smallest rise of C_T (as a ratio) the configured rules flag in one session and
    for a sustained shift, the rule that flags it, and the kerma fall of the same size by the Rose model.

    ``baseline``: from :func:`scorer.qc.control.compute_baseline`; ``rules``: :class:`AlertRules`.
    """
    rows = []
    records: Iterable[Any] = baseline.sort_values("diameter_mm").itertuples()  # rows of float columns
    for r in records:
        s, k = float(r.sigma_log10), int(r.n_sessions)
        se_w = float(r.se_within_log10) if r.se_within_log10 is not None and np.isfinite(r.se_within_log10) else s
        single = {}
        if "shewhart" in rules.rules and s > 0:
            single["shewhart"] = 10 ** shewhart_halfwidth(s, k, rules)
        if "baseline" in rules.rules:
            single["baseline"] = (1 + rules.worse_fraction) * 10 ** (Z975 * se_w)
        sustained = dict(single)
        if "ewma" in rules.rules and s > 0:
            sustained["ewma"] = 10 ** ewma_halfwidth(s, k, rules, 10**6)
        one = min(single.items(), key=lambda kv: kv[1]) if single else (None, np.nan)
        sus = min(sustained.items(), key=lambda kv: kv[1]) if sustained else (None, np.nan)
        rows.append(
            {
                "diameter_mm": float(r.diameter_mm),
                "sigma_log10": s,
                "n_sessions": k,
                "single_session_ratio": float(one[1]),
                "single_session_rule": one[0],
                "sustained_ratio": float(sus[1]),
                "sustained_rule": sus[0],
                "kerma_fall_single": float(1 - 1 / one[1] ** 2) if one[0] else np.nan,
                "kerma_fall_sustained": float(1 - 1 / sus[1] ** 2) if sus[0] else np.nan,
            }
        )
    return pd.DataFrame(rows)


def sensitivity_sentence(row: Mapping[Hashable, Any]) -> str:
    """One line: 'rise ×1.42 in one session (shewhart) — a kerma fall of 50 %; ×1.21 sustained (ewma) — 32 %'."""

    def part(ratio: float, rule: str | None, fall: float, what: str) -> str:
        if not rule:
            return f"no rule for {what}"
        return f"×{ratio:.3g} {what} ({rule}; kerma fall ≈ {100 * fall:.0f} % by the Rose model)"

    return (
        part(row["single_session_ratio"], row["single_session_rule"], row["kerma_fall_single"], "in one session")
        + ", "
        + part(row["sustained_ratio"], row["sustained_rule"], row["kerma_fall_sustained"], "sustained")
    )
