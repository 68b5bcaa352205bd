"""The checks :func:`scorer.observer.score_images` runs on real images: defects, periodic and fixed patterns.

Per image (:func:`check_image`): defective pixels and lines (:mod:`scorer.observer.defects`), and those of a
defect map measured from flat fields, give the sites to exclude; the background spectrum's narrow peaks
(:mod:`scorer.observer.patterns`) are found and, on request, notched out before scoring.  Across the set
(:class:`SetChecks`): a pattern shared by the images, spots at the same pixels in every image (excluded like
defects), and the set's spectrum and peaks.  Everything is reported: per image which sites were excluded and
why, one warning line per image, one per pattern.

An exclusion removes the whole M-AFC trial (image × target) the site belongs to: see
:mod:`scorer.observer.defects` for why.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from scorer.observer.defects import (
    DEFAULT_FALSE_FLAG_RATE,
    DefectMap,
    ImageDefects,
    find_defects,
    fixed_spots,
    plate_masks,
    site_effects,
    site_exclusions,
    spot_label,
)
from scorer.observer.npw import SiteRegion, site_regions
from scorer.observer.patterns import (
    BackgroundSpectrum,
    FixedPattern,
    PeriodicPeak,
    background_spectrum,
    find_peaks,
    fixed_pattern,
    notch,
)

#: the contrast scale of every threshold Limen reports (stated in results.json and the report)
CONTRAST_SCALE = (
    "nominal contrast of the layout: the fractional drop of the primary beam's air kerma behind each disc, as the "
    "layout states it (scatter and the detector's energy response are not included, so the contrast in the image "
    "is lower where scatter adds a pedestal)"
)
#: how many exclusions one warning line names before "and N more"
LISTED = 3


@dataclass
class ImageChecks:
    """What the checks found in one image and what they changed."""

    image: str
    found: ImageDefects
    defects: list  # named defects: the image's, then the defect map's (index k − 1 for label k)
    excluded: dict[tuple[str, int], str]  # (target, site) → reason
    masked: dict[tuple[str, int], tuple[str, int]]  # (target, site) → (reason, defective pixels left out)
    peaks: list[PeriodicPeak]
    notched: bool
    spectrum: BackgroundSpectrum | None
    regions: list[SiteRegion] = field(default_factory=list, repr=False)
    label: np.ndarray | None = field(default=None, repr=False)
    mask: np.ndarray | None = field(default=None, repr=False)  # pixels the observer leaves out

    def to_dict(self) -> dict:
        d = self.found.to_dict()
        d["defect_map_defects"] = [x.name for x in self.defects if getattr(x, "source", "image") != "image"]
        return {
            "defects": d,
            "excluded_sites": [{"target": t, "site": s, "reason": r} for (t, s), r in sorted(self.excluded.items())],
            "masked_sites": [
                {"target": t, "site": s, "reason": r, "pixels_left_out": n}
                for (t, s), (r, n) in sorted(self.masked.items())
            ],
            "periodic_peaks": [p.to_dict() for p in self.peaks],
            "notch_applied": self.notched,
        }


def check_image(
    image,
    layout,
    placement,
    blur,
    observer: str,
    *,
    image_id: str = "",
    defect_map: DefectMap | None = None,
    apply_notch: bool = False,
    false_flag_rate: float = DEFAULT_FALSE_FLAG_RATE,
):
    """Defects, exclusions and periodic peaks of one image; returns (ImageChecks, the image to score).

    The image to score is the given one, or with ``apply_notch`` and peaks found a copy whose pixels are
    notch-filtered (:func:`scorer.observer.patterns.notch`).
    """
    from dataclasses import replace

    pixels = np.asarray(image.pixels, float)
    regions = site_regions(layout, placement, blur, observer)
    tested, features, allowance = plate_masks(pixels.shape, layout, placement, regions)
    found = find_defects(pixels, tested, features, allowance, false_flag_rate=false_flag_rate, keep_residual=True)
    defects = list(found.defects)
    label = found.label
    if defect_map is not None:
        map_defects, map_label = defect_map.labelled(pixels.shape)
        label = np.where(map_label > 0, map_label + len(defects), label).astype(np.int32)
        defects += map_defects
    effects = site_effects(defects, label, regions)
    bad = label > 0
    valid = found.valid & ~bad
    spectrum = background_spectrum(found.residual, valid, image.pixel_mm)
    peaks = find_peaks(spectrum) if spectrum is not None else []
    notched = False
    if apply_notch and peaks:
        # defects filled with the smooth background first, so a dead line does not ring through the notch
        filled = notch(np.where(bad, found.background, pixels), peaks, image.pixel_mm)
        image = replace(image, pixels=np.where(bad, pixels, filled))
        notched = True
    found.valid, found.background = valid, None
    checks = ImageChecks(
        image_id,
        found,
        defects,
        effects.excluded,
        effects.masked,
        peaks,
        notched,
        spectrum,
        regions,
        label,
        effects.mask,
    )
    return checks, image


class SetChecks:
    """Collects the images' checks, then finds what only the set shows (see module docstring).

    Feed each image with :meth:`add` (one image in memory at a time), then call :meth:`finish`.
    """

    def __init__(self, n_images: int, *, false_flag_rate: float = DEFAULT_FALSE_FLAG_RATE, notch: bool = False):
        self.n_images = n_images
        self.false_flag_rate = false_flag_rate
        self.notch = notch
        self.images: list[ImageChecks] = []
        self.spectrum: BackgroundSpectrum | None = None
        self.peaks: list[PeriodicPeak] = []
        self.fixed: FixedPattern | None = None
        self.spots: list = []
        self.notes: list[str] = []
        self._shape = None
        self._sum = self._sum2 = self._count = None

    def add(self, checks: ImageChecks) -> None:
        """Take one image's checks; its residual, masks and labels are dropped once summed (one image's arrays
        in memory at a time)."""
        self.images.append(checks)
        if checks.spectrum is not None:
            self.spectrum = checks.spectrum if self.spectrum is None else self.spectrum.combined(checks.spectrum)
        e, v = checks.found.residual, checks.found.valid
        checks.found.residual = checks.found.valid = checks.found.label = checks.label = None
        if e is None or self._shape == "mixed":
            return
        if self._shape is None:
            self._shape = e.shape
            self._sum, self._sum2, self._count = np.zeros(e.shape), np.zeros(e.shape), np.zeros(e.shape, np.int32)
        if e.shape != self._shape:
            self.notes.append("images of different sizes: no search for patterns shared by the images")
            self._shape = "mixed"
            self._sum = self._sum2 = self._count = None
            return
        self._sum += np.where(v, e, 0.0)
        self._sum2 += np.where(v, e * e, 0.0)
        self._count += v

    def finish(self) -> None:
        """Set-level peaks, the fixed-pattern test and fixed spots (their sites join the exclusions)."""
        if self.spectrum is not None:
            self.peaks = find_peaks(self.spectrum)
        n = len(self.images)
        if self._shape is not None and self._shape != "mixed" and n >= 2:
            pixel_mm = self.spectrum.pixel_mm if self.spectrum is not None else 1.0
            self.fixed = fixed_pattern(self._sum, self._sum2, self._count, n, peaks=self.peaks, pixel_mm=pixel_mm)
            self.spots = fixed_spots(self._sum, self._count, n, false_flag_rate=self.false_flag_rate)
            if self.spots:
                label = spot_label(self.spots, self._shape)
                for ch in self.images:
                    extra = site_exclusions(self.spots, label, ch.regions)
                    for key, why in extra.items():
                        ch.excluded[key] = why if key not in ch.excluded else f"{ch.excluded[key]}; {why}"
        self._sum = self._sum2 = self._count = None
        for ch in self.images:
            ch.regions = []
            ch.label = None
            ch.mask = None

    # ------------------------------------------------------------------ results
    def mark(self, responses: pd.DataFrame) -> pd.DataFrame:
        """The responses with an ``excluded`` column (the reason for an excluded site, the excluded site's
        name for the other sites of its trial, empty for the sites used) and ``masked_px`` (defective pixels
        left out of a kept site's background ring)."""
        out = responses.copy()
        reasons = {}
        trial_reason = {}
        n_masked = {}
        for ch in self.images:
            for (t, s), why in ch.excluded.items():
                reasons[(ch.image, t, s)] = why
                trial_reason.setdefault((ch.image, t), f"trial left out: site {s} — {why}")
            for (t, s), (_why, n) in ch.masked.items():
                n_masked[(ch.image, t, s)] = n
        col, npx = [], []
        for img, t, s in zip(out["image"], out["target"], out["site"]):
            why = reasons.get((img, t, int(s)))
            col.append(why if why is not None else trial_reason.get((img, t), ""))
            npx.append(n_masked.get((img, t, int(s)), 0))
        out["excluded"] = col
        out["masked_px"] = npx
        return out

    def exclusions_json(self) -> list[dict]:
        return [
            {"image": ch.image, "target": t, "site": s, "reason": r}
            for ch in self.images
            for (t, s), r in sorted(ch.excluded.items())
        ]

    def image_count(self, peak: PeriodicPeak, tol_per_mm: float) -> int:
        """How many images show a peak within ``tol_per_mm`` of ``peak`` (or of its mirror)."""
        k = 0
        for ch in self.images:
            for p in ch.peaks:
                d1 = np.hypot(p.fx_per_mm - peak.fx_per_mm, p.fy_per_mm - peak.fy_per_mm)
                d2 = np.hypot(p.fx_per_mm + peak.fx_per_mm, p.fy_per_mm + peak.fy_per_mm)
                if min(d1, d2) <= tol_per_mm:
                    k += 1
                    break
        return k

    def _tol(self) -> float:
        sp = self.spectrum
        return 2.0 / (sp.roi_px * sp.pixel_mm) if sp is not None else 0.0

    def patterns_json(self) -> dict:
        sp = self.spectrum
        spectrum = None
        if sp is not None:
            f, med, mx = sp.radial_profile()
            spectrum = {
                "frequency_per_mm": f.tolist(),
                "median_nnps_mm2": med.tolist(),
                "max_nnps_mm2": mx.tolist(),
                "n_rois": sp.n_rois,
                "roi_px": sp.roi_px,
                "method": "averaged Hann-windowed periodograms of the background's relative residual over "
                "non-overlapping ROIs (NNPS method of IEC 62220-1), median and maximum over annuli",
            }
        return {
            "periodic": [{**p.to_dict(), "n_images": self.image_count(p, self._tol())} for p in self.peaks],
            "notch": self.notch,
            "fixed_pattern": None if self.fixed is None else self.fixed.to_dict(),
            "fixed_spots": [s.to_dict() for s in self.spots],
            "spectrum": spectrum,
            "notes": list(self.notes),
        }

    def warnings(self, names: dict[str, str] | None = None) -> list[str]:
        """One line per image with exclusions or line defects, one per pattern."""
        names = names or {}
        out = []
        for ch in self.images:
            name = names.get(ch.image, ch.image)
            touched = [*ch.excluded.values(), *(r for r, _n in ch.masked.values())]
            lines_free = [d.name for d in ch.found.lines if not any(d.name in r for r in touched)]
            if ch.excluded or ch.masked:
                items = [f"{t} site {s}: {r}" for (t, s), r in sorted(ch.excluded.items())]
                more = f"; and {len(items) - LISTED} more (results.json, responses.csv)" if len(items) > LISTED else ""
                text = (
                    f"{len(items)} site(s) excluded for defects, with their M-AFC trials — " + "; ".join(items[:LISTED])
                    if items
                    else ""
                )
                kept = (
                    f"{len(ch.masked)} site(s) kept with defective pixels left out of their background ring"
                    if ch.masked
                    else ""
                )
                out.append(f"{name}: " + "; ".join(x for x in (text + more, kept) if x))
            if lines_free:
                out.append(f"{name}: {', '.join(lines_free)} (no site touched)")
            if ch.found.clipped_fraction >= 1e-3:
                out.append(
                    f"{name}: {100 * ch.found.clipped_fraction:.2g} % of the pixels are clipped at the detector's "
                    "maximum: repeat the exposure at a lower dose"
                )
        tol = self._tol()
        for p in self.peaks:
            k = self.image_count(p, tol)
            action = (
                "removed by the notch filter before scoring"
                if self.notch and k
                else "thresholds of the smallest discs may read high; --notch removes it"
            )
            out.append(
                f"periodic pattern in the background: {p.describe()} (in {k} of {len(self.images)} images); {action}"
            )
        if self.fixed is not None and self.fixed.significant:
            out.append(self.fixed.describe() + "; the d′ method widens its CI for the extra scatter")
        for s in self.spots:
            out.append(f"{s.name}: the sites it touches are excluded in every image")
        return out + self.notes
