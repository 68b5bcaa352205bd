"""Defective pixels and lines in a phantom image, found by robust statistics, named, and the sites they touch.

A real exposure has hot and dead pixels, dust, dead or saturated rows and columns.  One hot pixel in a site's
region moves its response by many noise SDs, so the site's M-AFC trial says nothing about the disc.  This module
finds such departures from the local noise and lists the sites they touch; :func:`scorer.observer.score_images`
then leaves those trials out and says so.

Method (one image)
------------------
* **Where.**  The plate (the layout's outline inset by 2 mm) and every site's region, without the markers'
  footprints.  The signal discs' footprints are kept, with an allowance for the disc (below).
* **Relative residual.**  e = g / b − 1, b a smooth background: a normalised Gaussian convolution
  (σ = 8 px, computed on a 4 × 4-binned grid) of the tested pixels, leaving out the discs, the markers and,
  in a second pass, the pixels the first pass flagged (normalised convolution, Knutsson & Westin 1993).
  A heel effect, scatter pedestal or smooth non-uniformity goes into b, not into e.
* **Noise scale.**  σ of e in 64 × 64-pixel blocks, from the median absolute deviation: σ = 1.4826·MAD
  (consistent for Gaussian noise; Rousseeuw & Croux 1993), so neither the defects nor the discs inflate it.
  Where values are quantised (8-bit images, noise of about a grey level) the MAD can collapse, so where it is
  below two grey steps the scale is the larger of it and the SD of the block's values winsorised at their 1st
  and 99th percentiles (÷ 0.982, the same scale for Gaussian data); the grey step's rounding variance q²/12 is
  added (Sheppard's correction): a one-level departure is never a defect.
* **Pixels.**  A pixel is flagged when |e| > z·σ, with z = Φ⁻¹(1 − α/(2N)) for N pixels tested (Šidák's
  bound for N tests): a clean image with Gaussian noise then holds α flagged pixels on average (α = 10⁻³ per
  image by default).  In a signal disc's footprint the bound is widened by twice the disc's nominal contrast,
  so a disc is never a defect.  Flagged pixels are grouped (8-connected) and named: hot pixel, hot cluster,
  dark pixel, dark spot (dust), saturated pixels.
* **Lines.**  Each row and each column is cut into 128-pixel segments; the 10 %-winsorised mean of e over a
  segment (robust like a median, but smooth on quantised values), times √(pixels in it), is compared with the
  robust SD of that statistic over all segments of the image (never below the pixels' σ, its value for white
  noise), with the same α-bound over the number of segments.  The empirical scale absorbs correlated noise and
  periodic patterns (grid lines move every column alike, so none stands out).  Flagged segments of a line merge
  into a line defect, named by what its pixels are: saturated (≥ half at the image's plateau maximum), dead
  (≤ 20 % of the background), else dark or bright by its median departure.  Adjacent lines of one kind merge
  ("dead columns 87–88").  Rows and columns are counted from 0.
* **Saturation.**  A plateau at the image maximum is clipping.  When the plateau pixels outside the line
  defects are widespread (≥ 0.1 % of the image, :func:`scorer.observer.npw.saturation_level`), it is an
  over-exposure, not a defect: those pixels are not flagged and the observer refuses the sites that touch them
  (advising a lower dose).  A saturated line or a few saturated pixels are defects.

Across the images of a set, :func:`fixed_spots` finds spots that sit at the same pixels in every image (dust
on the detector, a faint defect) in the mean residual, whose noise is σ/√n.

Sites
-----
A defect (dilated by one pixel) that reaches a site's disc footprint (the template's support, the region's
inner radius + 1 px; :func:`scorer.observer.npw.site_regions`) excludes the site, with the defect's name as
the reason, and the whole M-AFC trial of that image and target is left out: a decision among M − 1 sites is
not an M-AFC trial (the count method), and the d′ method pools one noise SD over the sites of a diameter, which
a template with pixels removed would no longer share (for discs of about a pixel, a masked pixel removes most
of the signal).  A defect only in the site's background ring is masked instead: its pixels leave the target's
shared background fit (and the template, whose weight there is nil), the response stays an unbiased contrast
estimate with almost the same noise, and the site is kept — unless the defects cover more than half of the ring.
A thin line crossing a row of sites thus costs the trials whose discs it crosses, not every trial it touches.

References
----------
.. [1] Rousseeuw, P. J. & Croux, C. "Alternatives to the median absolute deviation", J. Am. Stat. Assoc. 88
       (1993) — the MAD and its consistency factor 1.4826 for Gaussian data.
.. [2] Šidák, Z. "Rectangular confidence regions for the means of multivariate normal distributions",
       J. Am. Stat. Assoc. 62 (1967) — the per-test level for a family-wise error over N tests.
.. [3] Knutsson, H. & Westin, C.-F. "Normalized and differential convolution", Proc. IEEE CVPR (1993).

Modules
-------
:mod:`~scorer.observer.robust_residual` (residual, noise scale, bound), :mod:`~scorer.observer.defect_records`
(what is reported), :mod:`~scorer.observer.defect_lines` (rows and columns), :mod:`~scorer.observer.defect_search`
(one image, the set's fixed spots), :mod:`~scorer.observer.defect_sites` (the sites touched),
:mod:`~scorer.observer.defect_map` (flat fields).  Their public names are importable from here.
"""

from scorer.observer.defect_lines import DEAD_LEVEL, SEGMENT_PX, find_line_defects
from scorer.observer.defect_map import DefectMap, defect_map_from_flats, fill_defects
from scorer.observer.defect_records import ImageDefects, LineDefect, PixelDefect, SiteExclusion
from scorer.observer.defect_search import (
    CLIPPING_FRACTION,
    DISC_ALLOWANCE,
    PLATE_INSET_MM,
    find_defects,
    fixed_spots,
    plate_masks,
    spot_label,
)
from scorer.observer.defect_sites import SiteEffects, site_effects, site_exclusions
from scorer.observer.robust_residual import (
    BIN,
    BLOCK_PX,
    DEFAULT_FALSE_FLAG_RATE,
    MAD_TO_SD,
    SMOOTH_SIGMA_PX,
    block_sd,
    outlier_z,
    plateau_level,
    quantisation_step,
    relative_residual,
    robust_sd,
)

__all__ = [
    "BIN",
    "BLOCK_PX",
    "CLIPPING_FRACTION",
    "DEAD_LEVEL",
    "DEFAULT_FALSE_FLAG_RATE",
    "DISC_ALLOWANCE",
    "MAD_TO_SD",
    "PLATE_INSET_MM",
    "SEGMENT_PX",
    "SMOOTH_SIGMA_PX",
    "DefectMap",
    "ImageDefects",
    "LineDefect",
    "PixelDefect",
    "SiteEffects",
    "SiteExclusion",
    "block_sd",
    "defect_map_from_flats",
    "fill_defects",
    "find_defects",
    "find_line_defects",
    "fixed_spots",
    "outlier_z",
    "plate_masks",
    "plateau_level",
    "quantisation_step",
    "relative_residual",
    "robust_sd",
    "site_effects",
    "site_exclusions",
    "spot_label",
]
