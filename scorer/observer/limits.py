"""Limits on threshold contrast, and the verdict per diameter.

A limits file (TOML, format ``limen-limits/1``) is user-editable::

    format = "limen-limits/1"
    name = "Site acceptance limits"
    observer = "human"        # whose thresholds the numbers are for: human, npw or npwe
    source = "where the numbers come from"
    condition = "50 mm PMMA-equivalent, automatic exposure"   # optional

    [[limits]]
    diameter_mm = 0.1
    acceptable = 0.23         # threshold contrast (fraction) that must not be exceeded
    achievable = 0.158        # optional: the better level worth reaching

Verdict per layout diameter (inside the range the file covers; limits are
interpolated linearly in log(diameter)–log(contrast), never extrapolated):

* ``pass`` — the upper confidence limit of the threshold is below the acceptable limit;
* ``fail`` — the lower confidence limit is above it;
* ``indeterminate`` — the confidence interval straddles the limit;
* ``no limit`` — the diameter lies outside the file's range.

Limits written for human readers are compared with model-observer thresholds only
through a human/model factor (human threshold ≈ factor × model threshold); without
one the comparison is refused.
"""

from __future__ import annotations

from dataclasses import dataclass, asdict
from pathlib import Path

import numpy as np

from scorer.errors import LimenError
from scorer.files import read_toml

FORMAT = "limen-limits/1"
OBSERVERS = ("human", "npw", "npwe")
DATA_DIR = Path(__file__).resolve().parents[1] / "data"
EXAMPLE_LIMITS = DATA_DIR / "limits-eu-guidelines-2006-digital-mammography.toml"


@dataclass(frozen=True)
class Limits:
    name: str
    observer: str
    source: str
    diameters_mm: tuple[float, ...]
    acceptable: tuple[float, ...]
    achievable: tuple[float | None, ...]
    condition: str = ""
    path: str = ""

    def _interp(self, values, diameter_mm: float) -> float | None:
        d = np.asarray(self.diameters_mm)
        if not (d.min() * (1 - 1e-9) <= diameter_mm <= d.max() * (1 + 1e-9)):
            return None
        pairs = [(x, v) for x, v in zip(self.diameters_mm, values) if v is not None]
        if len(pairs) == 1:
            return pairs[0][1] if np.isclose(pairs[0][0], diameter_mm) else None
        if not pairs:
            return None
        x = np.log([p[0] for p in pairs])
        y = np.log([p[1] for p in pairs])
        lx = np.log(diameter_mm)
        if lx < x.min() - 1e-9 or lx > x.max() + 1e-9:
            return None
        return float(np.exp(np.interp(lx, x, y)))

    def acceptable_at(self, diameter_mm: float) -> float | None:
        return self._interp(self.acceptable, diameter_mm)

    def achievable_at(self, diameter_mm: float) -> float | None:
        return self._interp(self.achievable, diameter_mm)


def load_limits(path) -> Limits:
    """Read and validate a limits file (errors name the file and the entry)."""
    path = Path(path)
    data = read_toml(path, "limits file")
    allowed = {"format", "name", "observer", "source", "condition", "limits"}
    extra = sorted(set(data) - allowed)
    if extra:
        raise LimenError(f"unknown key {extra[0]!r} in limits file", path)
    if data.get("format") != FORMAT:
        raise LimenError(f"expected format = \"{FORMAT}\", got {data.get('format')!r}", path)
    observer = str(data.get("observer", "")).lower()
    if observer not in OBSERVERS:
        raise LimenError(f"'observer' must be one of {', '.join(OBSERVERS)} (whose thresholds the limits are for), "
                         f"got {data.get('observer')!r}", path)
    if not str(data.get("source", "")).strip():
        raise LimenError("'source' is required: say where the limit values come from", path)
    rows = data.get("limits")
    if not isinstance(rows, list) or not rows:
        raise LimenError("no [[limits]] entries", path)
    ds, acc, ach = [], [], []
    for i, r in enumerate(rows):
        entry = f"limits entry {i + 1}"
        if not isinstance(r, dict):
            raise LimenError(f"{entry}: must be a table", path)
        extra = sorted(set(r) - {"diameter_mm", "acceptable", "achievable"})
        if extra:
            raise LimenError(f"{entry}: unknown key {extra[0]!r}", path)
        try:
            d = float(r["diameter_mm"])
            a = float(r["acceptable"])
            b = None if r.get("achievable") is None else float(r["achievable"])
        except KeyError as exc:
            raise LimenError(f"{entry}: missing {exc.args[0]!r}", path) from None
        except (TypeError, ValueError):
            raise LimenError(f"{entry}: values must be numbers", path) from None
        if not d > 0:
            raise LimenError(f"{entry}: diameter_mm must be positive", path)
        for name, v in (("acceptable", a), ("achievable", b)):
            if v is not None and not 0 < v < 1:
                raise LimenError(f"{entry}: {name} must be a contrast fraction in (0, 1), got {v:g}", path)
        ds.append(d)
        acc.append(a)
        ach.append(b)
    order = np.argsort(ds)
    if len(set(ds)) != len(ds):
        raise LimenError("two limits entries share a diameter", path)
    return Limits(str(data.get("name", path.stem)), observer, str(data["source"]),
                  tuple(ds[i] for i in order), tuple(acc[i] for i in order), tuple(ach[i] for i in order),
                  str(data.get("condition", "")), str(path))


@dataclass
class Verdict:
    diameter_mm: float
    threshold_contrast: float        # as compared (× human factor where applied)
    ci_low: float
    ci_high: float
    acceptable: float | None
    achievable: float | None
    verdict: str                     # pass | fail | indeterminate | no limit | no threshold
    achievable_met: bool | None
    method: str
    observer: str
    human_factor: float | None
    note: str = ""

    def to_dict(self) -> dict:
        return asdict(self)


def evaluate(curve, limits: Limits, human_factor: float | None = None) -> list[Verdict]:
    """Verdicts for every point of a :class:`~scorer.observer.threshold.ThresholdCurve` against ``limits``."""
    obs = curve.observer.lower()
    factor = None
    if limits.observer == "human" and obs in ("npw", "npwe"):
        if human_factor is None:
            raise LimenError(
                f"{limits.path or 'limits'}: these limits are for human readers and the thresholds come from the "
                f"{obs.upper()} model observer; give a human/model factor (--human-factor) to compare them")
        if not human_factor > 0:
            raise LimenError(f"--human-factor must be positive, got {human_factor}")
        factor = float(human_factor)
    elif limits.observer != obs and not (limits.observer == "human" and obs == "human"):
        raise LimenError(f"{limits.path or 'limits'}: these limits are for the {limits.observer} observer, "
                         f"the thresholds come from {obs}")
    out = []
    for p in curve.points:
        f = factor or 1.0
        t, lo, hi = p.threshold_contrast * f, p.ci_low * f, p.ci_high * f
        acc, ach = limits.acceptable_at(p.diameter_mm), limits.achievable_at(p.diameter_mm)
        note = ""
        if acc is None:
            v = "no limit"
        elif not np.isfinite(t):
            v = "no threshold"
        elif np.isfinite(lo) and np.isfinite(hi):
            v = "pass" if hi < acc else "fail" if lo > acc else "indeterminate"
        else:
            v = "pass" if t < acc else "fail"
            note = "no confidence interval: verdict from the estimate alone"
        met = None if ach is None or not np.isfinite(t) else bool(t <= ach)
        out.append(Verdict(p.diameter_mm, t, lo, hi, acc, ach, v, met, p.method, p.observer, factor, note))
    return out


def overall(verdicts: list[Verdict]) -> str:
    """'fail' if any diameter fails, else 'indeterminate' if any is, else 'pass' ('no limit' if none apply)."""
    vs = {v.verdict for v in verdicts}
    if "fail" in vs:
        return "fail"
    if "indeterminate" in vs or "no threshold" in vs:
        return "indeterminate"
    if "pass" in vs:
        return "pass"
    return "no limit"
