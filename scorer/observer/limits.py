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

from dataclasses import asdict, dataclass
from pathlib import PurePath

import numpy as np

from scorer.errors import LimenError
from scorer.observer.flags import threshold_flags

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

    def to_dict(self) -> dict[str, str]:
        """What a result's JSON says about the limits it was judged against (name, observer, source, path)."""
        return {"name": self.name, "observer": self.observer, "source": self.source, "path": self.path}

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
    extrapolated: bool = False  # the threshold (or the factor applied to it) lies beyond what was measured

    @property
    def flags(self) -> list[str]:
        """Flags of the compared threshold (:mod:`scorer.observer.flags`)."""
        return threshold_flags(asdict(self))

    def to_dict(self) -> dict:
        d = asdict(self)
        d["flags"] = threshold_flags(d)
        return d


#: how the threshold methods are named to a reader of an error message
METHOD_NAMES = {"count": "count method", "dprime": "d′ method", "": "unspecified method"}


@dataclass(frozen=True)
class FactorTrend:
    """A human/model factor that depends on diameter: log F(d) = a + b·log(d/d_ref), with the covariance of
    (a, b) (from the reader study's bootstrap), fitted over ``diameter_range_mm``."""

    intercept: float
    slope: float
    reference_diameter_mm: float
    cov: tuple[tuple[float, float], tuple[float, float]]
    diameter_range_mm: tuple[float, float]
    p_value: float | None = None
    degrees_of_freedom: float | None = None  # Student t for the few readers (None: normal)

    def at(self, diameter_mm: float, ci: float = 0.95) -> tuple[float, float, float]:
        """Factor at ``diameter_mm`` and its CI (normal, or Student t on the readers' df, on the log scale)."""
        from scipy import stats

        x = float(np.log(diameter_mm / self.reference_diameter_mm))
        (vaa, vab), (_, vbb) = self.cov
        mean = self.intercept + self.slope * x
        se = float(np.sqrt(max(vaa + x * x * vbb + 2 * x * vab, 0.0)))
        nu = self.degrees_of_freedom
        z = float(stats.t.ppf(0.5 + ci / 2, nu) if nu else stats.norm.ppf(0.5 + ci / 2))
        return float(np.exp(mean)), float(np.exp(mean - z * se)), float(np.exp(mean + z * se))

    def covers(self, diameter_mm: float) -> bool:
        lo, hi = self.diameter_range_mm
        return lo * (1 - 1e-6) <= diameter_mm <= hi * (1 + 1e-6)

    @classmethod
    def from_dict(cls, d: dict) -> "FactorTrend":
        cov = np.asarray(d["cov_intercept_slope"], dtype=float)
        return cls(
            float(d["intercept"]),
            float(d["slope"]),
            float(d["reference_diameter_mm"]),
            ((float(cov[0, 0]), float(cov[0, 1])), (float(cov[1, 0]), float(cov[1, 1]))),
            (float(d["diameter_range_mm"][0]), float(d["diameter_range_mm"][1])),
            None if d.get("p_value") is None else float(d["p_value"]),
            None if d.get("degrees_of_freedom") is None else float(d["degrees_of_freedom"]),
        )


@dataclass(frozen=True)
class HumanFactor:
    """Human/model threshold factor with its 95 % CI (from a reader study), applied to model thresholds.

    ``method``: the threshold method it was measured for ("count", "dprime"; "" for a number given by hand,
    which applies to either); it is applied only to thresholds of that method (:meth:`for_method`), and
    ``others`` holds the same study's factors for the other methods.  ``trend``: set when the factor depends on
    diameter; :meth:`at` then gives each diameter its own factor and CI.
    """

    value: float
    ci_low: float | None = None
    ci_high: float | None = None
    source: str = ""
    method: str = ""
    trend: FactorTrend | None = None
    others: tuple["HumanFactor", ...] = ()

    @property
    def has_ci(self) -> bool:
        return (
            self.ci_low is not None
            and self.ci_high is not None
            and 0 < self.ci_low <= self.value <= self.ci_high
            and np.isfinite(self.ci_high)
        )

    def for_method(self, method: str) -> "HumanFactor":
        """The factor measured for threshold ``method``; a factor of another method is refused (one line)."""
        if not method or not self.method or self.method == method:
            return self
        for f in self.others:
            if f.method == method:
                return f
        have = " and ".join(METHOD_NAMES.get(f.method, f.method) for f in (self, *self.others))
        raise LimenError(
            f"the human/model factor was measured on the {have} only, and these thresholds come from the "
            f"{METHOD_NAMES.get(method, method)}: a factor applies like for like (give `limen analyse --model` the "
            "model's responses.csv to measure it for the d′ method, or use --method count)",
            self.source or "--human-factor-from",
        )

    def at(self, diameter_mm: float) -> "HumanFactor":
        """The factor at one diameter: the trend's value and CI when it depends on diameter, else itself."""
        if self.trend is None:
            return self
        v, lo, hi = self.trend.at(diameter_mm)
        return HumanFactor(v, lo, hi, self.source, self.method)


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
    if factor is not None:
        factor = factor.for_method(curve.method)
    out = []
    for p in curve.points:
        f_d = None if factor is None else factor.at(p.diameter_mm)
        if f_d is not None:
            t, lo, hi = human_equivalent(p.threshold_contrast, p.ci_low, p.ci_high, f_d)
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
        if factor is not None and factor.trend is not None and not factor.trend.covers(p.diameter_mm):
            lo_d, hi_d = factor.trend.diameter_range_mm
            note = (note + "; " if note else "") + (
                f"human/model factor extrapolated beyond the reader study's diameters ({lo_d:g}–{hi_d:g} mm)"
            )
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
                None if f_d is None else f_d.value,
                note,
                interp,
                censored,
                (f_d.ci_low, f_d.ci_high) if f_d is not None and f_d.has_ci else None,
                bool(getattr(p, "extrapolated", False))
                or (factor is not None and factor.trend is not None and not factor.trend.covers(p.diameter_mm)),
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
    (:func:`scorer.workflow.human_factor_from_analysis` reads the file).  Every threshold method the analysis
    measured comes along (:meth:`HumanFactor.for_method` picks the one that matches the thresholds); an entry
    of an older analysis without a method was measured on the count method.  A factor that rests on no
    usable cell (every fit at a search bound or not estimable) is refused, never exported.
    """
    try:
        hm = data["human_model_factor"]
    except KeyError:
        raise LimenError(
            "not an analysis.json with a human_model_factor (run limen analyse with --model)", path
        ) from None
    entries = (hm.get("by_observer") or [hm]) if isinstance(hm, dict) else []
    for e in entries:
        if str(e.get("observer", "")).lower() != observer:
            continue
        methods = e.get("by_method") or {e.get("method") or "count": e}
        factors, refused = [], []
        for method, me in methods.items():
            if not me.get("factor"):
                refused.append(f"{METHOD_NAMES.get(method, method)}: {me.get('note') or 'no factor'}")
                continue
            lo, hi = me.get("ci_low"), me.get("ci_high")
            tr = me.get("diameter_trend")
            factors.append(
                HumanFactor(
                    float(me["factor"]),
                    None if lo is None else float(lo),
                    None if hi is None else float(hi),
                    source=str(path),
                    method=str(method),
                    trend=FactorTrend.from_dict(tr) if tr and tr.get("depends_on_diameter") else None,
                )
            )
        if not factors:
            raise LimenError(
                f"no usable human/model factor for the {observer.upper()} observer in this analysis: "
                + "; ".join(refused),
                path,
            )
        first, rest = factors[0], tuple(factors[1:])
        return HumanFactor(first.value, first.ci_low, first.ci_high, first.source, first.method, first.trend, rest)
    found = ", ".join(sorted({str(e.get("observer")) for e in entries})) or "none"
    raise LimenError(
        f"no human/model factor for the {observer.upper()} observer in this analysis (factors for: {found})", path
    )
