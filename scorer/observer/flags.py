"""Flags on reported values: extrapolated, censored, above 100 % contrast, not estimable — decided once, here.

Every report (HTML tables and plots, CSV, JSON) of ``limen score``, ``limen dose-series`` and ``limen analyse``
marks a value that is not a plain measurement the same way, with the codes below:

* ``extrapolated`` — the value lies beyond what was measured: a d′-method threshold outside the contrasts the
  plate offers at its diameter (the linear observer's fit carries it there), a kerma beyond the kermas of the
  series, a human/model factor outside the reader study's diameters;
* ``censored`` — the count method (or a reader's fit) only says the threshold lies above the highest (or below
  the lowest) contrast offered; the value shown is that bound (``censored`` = "above"/"below" says which);
* ``above 100 %`` — a threshold contrast, or the upper end of its CI, above 100 %: no disc can lower the air
  kerma behind it by more than all of it, so the number is a statistical extrapolation, not a contrast a plate
  could hold (the CI is shown capped at 100 %);
* ``not estimable`` — no value: no signal, a fit at its search bound (all correct or at chance), no CI.

Pure functions on plain values and dicts (the JSON records Limen writes), so a report can flag a record it
reads back from a file as the code that wrote it would.
"""

from __future__ import annotations

import math
from typing import Iterable, Mapping

EXTRAPOLATED = "extrapolated"
CENSORED = "censored"
ABOVE_100 = "above 100 %"
NOT_ESTIMABLE = "not estimable"
#: every flag, in the order they are listed
FLAGS = (NOT_ESTIMABLE, CENSORED, EXTRAPOLATED, ABOVE_100)
#: what each flag says, for a table's legend
MEANING = {
    NOT_ESTIMABLE: "no value could be estimated (no signal, or a fit at its search bound)",
    CENSORED: "only a bound: the threshold lies above the highest (or below the lowest) contrast offered",
    EXTRAPOLATED: "beyond what was measured (contrasts offered, kermas of the series, diameters read)",
    ABOVE_100: "a contrast or CI end above 100 %, which no disc can have: a statistical extrapolation, "
    "shown capped at 100 %",
}


def _num(v) -> float:
    try:
        return float(v)
    except (TypeError, ValueError):
        return math.nan


def _finite(v) -> bool:
    return math.isfinite(_num(v))


def ordered(flags: Iterable[str]) -> list[str]:
    """Distinct flags in the order of :data:`FLAGS` (unknown ones last, as given)."""
    got = list(dict.fromkeys(f for f in flags if f))
    return [f for f in FLAGS if f in got] + [f for f in got if f not in FLAGS]


def contrast_flags(
    value,
    ci_low=None,
    ci_high=None,
    *,
    censored: str = "",
    extrapolated: bool = False,
    estimable: bool = True,
    offered_min=None,
    offered_max=None,
) -> list[str]:
    """Flags of a threshold contrast (a fraction) and its CI.

    ``extrapolated`` is also set when ``offered_min``/``offered_max`` are given and an uncensored value lies
    outside them.
    """
    out = []
    v = _num(value)
    if not estimable or not math.isfinite(v) or v <= 0:
        return [NOT_ESTIMABLE]
    if censored in ("above", "below"):
        out.append(CENSORED)
    elif extrapolated:
        out.append(EXTRAPOLATED)
    elif _finite(offered_min) and _finite(offered_max) and not (_num(offered_min) <= v <= _num(offered_max)):
        out.append(EXTRAPOLATED)
    hi = _num(ci_high)
    if v > 1.0 or (math.isfinite(hi) and hi > 1.0 and censored != "above"):
        out.append(ABOVE_100)
    return ordered(out)


def threshold_flags(rec: Mapping) -> list[str]:
    """Flags of a threshold record (a ThresholdPoint's dict, a reader-curve row, a verdict's dict).

    Reads ``threshold_contrast``, ``ci_low``, ``ci_high`` and, when present, ``censored``, ``extrapolated``,
    ``converged`` (False: a fit at its search bound), ``estimable`` (False: not an estimate by the study's
    rule, :mod:`scorer.study.estimability`), ``offered_min``/``offered_max``.
    """
    converged = rec.get("converged", True)
    estimable = not (converged is False or (isinstance(converged, float) and converged == 0.0))
    judged = rec.get("estimable", True)
    if judged is not None and not (isinstance(judged, float) and math.isnan(judged)) and not bool(judged):
        estimable = False
    return contrast_flags(
        rec.get("threshold_contrast"),
        rec.get("ci_low"),
        rec.get("ci_high"),
        censored=str(rec.get("censored") or ""),
        extrapolated=bool(rec.get("extrapolated") or False),
        estimable=estimable,
        offered_min=rec.get("offered_min"),
        offered_max=rec.get("offered_max"),
    )


def kerma_flags(kerma_ugy, measured_ugy: Iterable[float]) -> list[str]:
    """Flags of a kerma read off a fitted dose response: ``extrapolated`` beyond the kermas measured."""
    k = _num(kerma_ugy)
    ks = [float(x) for x in measured_ugy if _finite(x)]
    if not math.isfinite(k) or k <= 0:
        return [NOT_ESTIMABLE]
    if ks and not (min(ks) * (1 - 1e-9) <= k <= max(ks) * (1 + 1e-9)):
        return [EXTRAPOLATED]
    return []


def text(flags: Iterable[str]) -> str:
    """The flags as one cell of a table or CSV column: "extrapolated; above 100 %" (empty when none)."""
    return "; ".join(ordered(flags))


def capped_percent(v, digits: int = 3) -> str:
    """A contrast fraction as % text for a CI end: capped at 100 ("100 (capped)") when above it."""
    x = _num(v)
    if not math.isfinite(x):
        return "—"
    if x > 1.0:
        return "100 (capped)"
    return f"{100 * x:.{digits}g}"


def legend(flags_seen: Iterable[str]) -> str:
    """One sentence per flag that occurs, for a table's caption (empty when none)."""
    seen = ordered(flags_seen)
    return " ".join(f"“{f}”: {MEANING[f]}." for f in seen if f in MEANING)
