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

:func:`parse_limits` validates a limits file's parsed TOML; reading it is
:func:`scorer.workflow.load_limits`'s job (this module reads no file).
"""

from __future__ import annotations


from dataclasses import dataclass, asdict
from pathlib import PurePath

import numpy as np

from scorer.errors import LimenError

FORMAT = "limen-limits/1"
OBSERVERS = ("human", "npw", "npwe")


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

    def is_interpolated(self, diameter_mm: float) -> bool:
        """True where a limit exists only by interpolation between the file's diameters."""
        return self.acceptable_at(diameter_mm) is not None and not any(
            np.isclose(d, diameter_mm, rtol=1e-6) for d in self.diameters_mm
        )

    def acceptable_at(self, diameter_mm: float) -> float | None:
        return self._interp(self.acceptable, diameter_mm)

    def achievable_at(self, diameter_mm: float) -> float | None:
        return self._interp(self.achievable, diameter_mm)


def parse_limits(data: dict, path) -> Limits:
    """Validate the parsed TOML of a limits file (errors name ``path`` and the entry).

    ``path`` is the file the table came from: named in errors, kept as ``Limits.path``, and its stem is the
    name when the file gives none.  Reading the file is :func:`scorer.workflow.load_limits`'s job.
    """
    path = PurePath(path)
    allowed = {"format", "name", "observer", "source", "condition", "limits"}
    extra = sorted(set(data) - allowed)
    if extra:
        raise LimenError(f"unknown key {extra[0]!r} in limits file", path)
    if data.get("format") != FORMAT:
        raise LimenError(f'expected format = "{FORMAT}", got {data.get("format")!r}', path)
    observer = str(data.get("observer", "")).lower()
    if observer not in OBSERVERS:
        raise LimenError(
            f"'observer' must be one of {', '.join(OBSERVERS)} (whose thresholds the limits are for), "
            f"got {data.get('observer')!r}",
            path,
        )
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
    return Limits(
        str(data.get("name", path.stem)),
        observer,
        str(data["source"]),
        tuple(ds[i] for i in order),
        tuple(acc[i] for i in order),
        tuple(ach[i] for i in order),
        str(data.get("condition", "")),
        str(path),
    )


@dataclass
class Verdict:
    diameter_mm: float
    threshold_contrast: float  # as compared (× human factor where applied)
    ci_low: float
    ci_high: float
    acceptable: float | None
    achievable: float | None
    verdict: str  # pass | fail | indeterminate | no limit | no threshold
    achievable_met: bool | None
    method: str
    observer: str
    human_factor: float | None
    note: str = ""
    limit_interpolated: bool = False  # the limit at this diameter is interpolated between the file's diameters
    censored: str = ""  # the threshold is only known to lie above/below a contrast offered
    human_factor_ci: tuple[float, float] | None = None

    def to_dict(self) -> dict:
        return asdict(self)


@dataclass(frozen=True)
class HumanFactor:
    """Human/model threshold factor with its 95 % CI (from a reader study), applied to model thresholds."""

    value: float
    ci_low: float | None = None
    ci_high: float | None = None
    source: str = ""

    @property
    def has_ci(self) -> bool:
        return (
            self.ci_low is not None
            and self.ci_high is not None
            and 0 < self.ci_low <= self.value <= self.ci_high
            and np.isfinite(self.ci_high)
        )


def human_equivalent(t: float, lo: float, hi: float, factor: HumanFactor) -> tuple[float, float, float]:
    """Model threshold (and 95 % CI) → human-equivalent threshold (and 95 % CI).

    The two uncertainties are independent (model thresholds from these images; the factor from a reader
    study), so on the log scale, where the product is a sum, their standard errors add in quadrature:
    se² = se_model² + se_factor², each se = log(high/low)/(2·1.96) (normal approximation on log scale).
    One-sided (censored) model intervals multiply by the factor's matching bound instead (conservative).
    """
    f = factor.value
    if not factor.has_ci:
        return t * f, lo * f, hi * f
    if not (np.isfinite(lo) and np.isfinite(hi) and lo > 0 and hi > 0 and t > 0):
        lo_h = lo * factor.ci_low if np.isfinite(lo) else lo
        hi_h = hi * factor.ci_high if np.isfinite(hi) else hi
        return t * f, lo_h, hi_h
    z = 1.959963984540054
    se_m_lo, se_m_hi = np.log(t / lo) / z, np.log(hi / t) / z
    se_f_lo, se_f_hi = np.log(f / factor.ci_low) / z, np.log(factor.ci_high / f) / z
    th = t * f
    return th, th * np.exp(-z * np.hypot(se_m_lo, se_f_lo)), th * np.exp(z * np.hypot(se_m_hi, se_f_hi))


def evaluate(curve, limits: Limits, human_factor: float | None = None) -> list[Verdict]:
    """Verdicts for every point of a :class:`~scorer.observer.threshold.ThresholdCurve` against ``limits``."""
    obs = curve.observer.lower()
    factor = None
    if limits.observer == "human" and obs in ("npw", "npwe"):
        if human_factor is None:
            raise LimenError(
                f"{limits.path or 'limits'}: these limits are for human readers and the thresholds come from the "
                f"{obs.upper()} model observer; give a human/model factor (--human-factor) to compare them"
            )
        factor = human_factor if isinstance(human_factor, HumanFactor) else HumanFactor(float(human_factor))
        if not factor.value > 0:
            raise LimenError(f"--human-factor must be positive, got {factor.value}", "--human-factor")
    elif limits.observer != obs and not (limits.observer == "human" and obs == "human"):
        raise LimenError(
            f"{limits.path or 'limits'}: these limits are for the {limits.observer} observer, "
            f"the thresholds come from {obs}"
        )
    out = []
    for p in curve.points:
        if factor is not None:
            t, lo, hi = human_equivalent(p.threshold_contrast, p.ci_low, p.ci_high, factor)
        else:
            t, lo, hi = p.threshold_contrast, p.ci_low, p.ci_high
        acc, ach = limits.acceptable_at(p.diameter_mm), limits.achievable_at(p.diameter_mm)
        censored = getattr(p, "censored", "") or ""
        note = ""
        if acc is None:
            v = "no limit"
        elif not np.isfinite(t):
            v = "no threshold"
        elif not (np.isnan(lo) or np.isnan(hi)):  # a one-sided (censored) interval has an infinite end
            v = "pass" if hi < acc else "fail" if lo > acc else "indeterminate"
        else:
            v = "pass" if t < acc else "fail"
            note = "no confidence interval: verdict from the estimate alone"
        if censored:
            note = (
                note + "; " if note else ""
            ) + f"threshold {'above' if censored == 'above' else 'below'} the contrasts offered"
        met = None if ach is None or not np.isfinite(t) or censored == "above" else bool(t <= ach)
        interp = acc is not None and limits.is_interpolated(p.diameter_mm)
        if interp:
            note = (note + "; " if note else "") + (
                "limit interpolated between the file's diameters (informative; "
                "the overall verdict rests on the listed diameters)"
            )
        out.append(
            Verdict(
                p.diameter_mm,
                t,
                lo,
                hi,
                acc,
                ach,
                v,
                met,
                p.method,
                p.observer,
                None if factor is None else factor.value,
                note,
                interp,
                censored,
                (factor.ci_low, factor.ci_high) if factor is not None and factor.has_ci else None,
            )
        )
    return out


def counted(verdicts: list[Verdict]) -> list[Verdict]:
    """The verdicts that make the overall one: at the diameters the limits file lists, when any of them
    was measured; interpolated limits then inform but do not decide (a standard states its limits at its
    own diameters).  Without any listed diameter the interpolated verdicts are all there is."""
    listed = [v for v in verdicts if not v.limit_interpolated and v.verdict != "no limit"]
    return listed if listed else list(verdicts)


def overall(verdicts: list[Verdict]) -> str:
    """'fail' if any counted diameter fails, else 'indeterminate' if any is, else 'pass' ('no limit' if none
    apply); see :func:`counted`."""
    vs = {v.verdict for v in counted(verdicts)}
    if "fail" in vs:
        return "fail"
    if "indeterminate" in vs or "no threshold" in vs:
        return "indeterminate"
    if "pass" in vs:
        return "pass"
    return "no limit"


def parse_human_factor(data: dict, observer: str, path) -> HumanFactor:
    """The human/model threshold factor that `limen analyse --model` measured for ``observer``.

    ``data`` is the parsed analysis.json; ``path`` names it in errors and becomes the factor's source
    (:func:`scorer.workflow.human_factor_from_analysis` reads the file).
    """
    try:
        hm = data["human_model_factor"]
    except KeyError:
        raise LimenError(
            "not an analysis.json with a human_model_factor (run limen analyse with --model)", path
        ) from None
    entries = (hm.get("by_observer") or [hm]) if isinstance(hm, dict) else []
    for e in entries:
        if str(e.get("observer", "")).lower() == observer and e.get("factor"):
            lo, hi = e.get("ci_low"), e.get("ci_high")
            return HumanFactor(
                float(e["factor"]),
                None if lo is None else float(lo),
                None if hi is None else float(hi),
                source=str(path),
            )
    found = ", ".join(sorted({str(e.get("observer")) for e in entries})) or "none"
    raise LimenError(
        f"no human/model factor for the {observer.upper()} observer in this analysis (factors for: {found})", path
    )
