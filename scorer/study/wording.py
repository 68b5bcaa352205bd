"""Plain sentences for results: a threshold ratio in words."""

from __future__ import annotations

import numpy as np


def pct_phrase(ratio: float) -> str:
    """A ratio as a percentage difference in words: 1.28 → "28 % higher", 0.9 → "10 % lower"."""
    pct = (ratio - 1.0) * 100.0
    return f"{abs(pct):.0f} % {'higher' if pct >= 0 else 'lower'}"


def comparison_sentence(r: dict, by: str = "detector", ci: float = 0.95) -> str:
    """One plain sentence, e.g. "At 0.1 mm the indirect detector's threshold is 28 % higher than the
    direct detector's (95 % CI 12 % to 46 % higher; Holm-adjusted p = 0.002)."."""
    lo, hi = r["ci_low"], r["ci_high"]

    def bound(x):
        return pct_phrase(x)

    verdict = ""
    if lo <= 1.0 <= hi:
        verdict = " — no clear difference"
    p = r.get("p_adjusted", float("nan"))
    ptxt = f"; Holm-adjusted p = {p:.2g}" if np.isfinite(p) else ""
    return (
        f"At {r['diameter_mm']:g} mm the {r['level']} {by}'s threshold is {pct_phrase(r['ratio'])} than the "
        f"{r['reference']} {by}'s ({ci * 100:.0f} % CI {bound(lo)} to {bound(hi)}{ptxt}){verdict}."
    )
