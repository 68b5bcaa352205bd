"""Phantom layout files: Limen's own TOML description of a contrast-detail phantom.

A layout file says where everything on a contrast-detail plate lies, in
millimetres on the plate, so that Limen can find the plate in an image and
knows which candidate site holds each disc.  Format ``limen-layout/1``::

    format = "limen-layout/1"

    [phantom]
    name = "Example plate"
    width_mm = 150.0            # outline: a rectangle, origin at its top-left corner,
    height_mm = 130.0           # x to the right, y downwards (as drawn on the plate)
    description = "free text"   # optional

    [[fiducials]]               # three or more registration markers (discs)
    id = "A"
    x_mm = 7.0
    y_mm = 7.0
    diameter_mm = 3.0
    contrast = 0.6              # fractional drop in air kerma behind the marker

    [orientation_key]           # one marker unlike the fiducials (larger) that
    x_mm = 24.0                 # breaks every rotation/mirror symmetry
    y_mm = 7.0
    diameter_mm = 6.0
    contrast = 0.6

    [[targets]]                 # M-alternative forced choice: M candidate sites,
    id = "d0250-c04"            # one of which (signal_site, counted from 0) holds the disc
    diameter_mm = 0.25
    contrast = 0.012            # nominal contrast as a fraction (0 < c < 1)
    sites_mm = [[40.0, 30.27], [41.5, 32.87], [38.5, 32.87]]   # any M ≥ 2 (here a triangle)
    signal_site = 2
    material = "free text"      # optional, informative only
    thickness_um = 0.2          # optional

    [[targets]]                 # or: one known site plus background sites
    id = "k1"
    diameter_mm = 1.0
    contrast = 0.005
    known_site_mm = [60.0, 30.0]
    background_sites_mm = [[66.0, 30.0], [60.0, 36.0]]

Every problem is reported as a :class:`~scorer.errors.LimenError` naming the file,
the entry and the problem.
"""

from __future__ import annotations

import os
from collections.abc import Callable, Iterable, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Literal, NoReturn

import numpy as np
from numpy.typing import NDArray

from scorer.errors import LimenError
from scorer.files import read_toml
from scorer.resources import check_limit

FORMAT = "limen-layout/1"
PHANTOM_DIR = Path(__file__).resolve().parents[2] / "phantoms"
DEFAULT_LAYOUT_NAME = "cairn-demo-plate.toml"

# Minimum clear gap between two sites' discs, as a multiple of the larger radius,
# so that each site keeps a ring of its own background (common practice).
SITE_CLEARANCE_RADII = 1.0

_TOP_KEYS = {"format", "phantom", "fiducials", "orientation_key", "targets"}
_PHANTOM_KEYS = {"name", "width_mm", "height_mm", "description"}
_MARKER_KEYS = {"id", "x_mm", "y_mm", "diameter_mm", "contrast"}
_TARGET_KEYS = {
    "id",
    "diameter_mm",
    "contrast",
    "sites_mm",
    "signal_site",
    "known_site_mm",
    "background_sites_mm",
    "material",
    "thickness_um",
}


TargetDesign = Literal["mafc", "known"]


@dataclass(frozen=True)
class Marker:
    id: str
    x_mm: float
    y_mm: float
    diameter_mm: float
    contrast: float

    @property
    def xy_mm(self) -> tuple[float, float]:
        return (self.x_mm, self.y_mm)


@dataclass(frozen=True)
class Target:
    """One disc and its candidate sites.

    ``sites_mm`` has shape (M, 2); ``signal_site`` indexes the site that holds the disc.
    ``design`` is ``"mafc"`` (M candidates, one holds the disc) or ``"known"`` (site 0
    holds the disc at a known place, the others are background sites).
    """

    id: str
    diameter_mm: float
    contrast: float
    sites_mm: tuple[tuple[float, float], ...]
    signal_site: int
    design: TargetDesign = "mafc"
    material: str | None = None
    thickness_um: float | None = None

    @property
    def m_alternatives(self) -> int:
        return len(self.sites_mm)

    @property
    def sites(self) -> NDArray[np.float64]:
        return np.asarray(self.sites_mm, dtype=float)

    @property
    def signal_xy_mm(self) -> tuple[float, float]:
        return self.sites_mm[self.signal_site]


@dataclass(frozen=True)
class Layout:
    name: str
    width_mm: float
    height_mm: float
    fiducials: tuple[Marker, ...]
    orientation_key: Marker
    targets: tuple[Target, ...]
    description: str = ""
    source_path: str = ""

    @property
    def center_mm(self) -> tuple[float, float]:
        return (self.width_mm / 2.0, self.height_mm / 2.0)

    @property
    def diameters_mm(self) -> list[float]:
        return sorted({t.diameter_mm for t in self.targets})

    @property
    def markers(self) -> tuple[Marker, ...]:
        """Fiducials followed by the orientation key."""
        return self.fiducials + (self.orientation_key,)

    def targets_with_diameter(self, diameter_mm: float) -> list[Target]:
        return [t for t in self.targets if t.diameter_mm == diameter_mm]

    def max_site_radius_mm(self) -> float:
        return max(t.diameter_mm for t in self.targets) / 2.0


def default_layout_path() -> Path:
    """The bundled demo phantom's layout file.

    In a source checkout it is ``phantoms/`` at the top of the repository; an installed Limen carries the
    same folder as the data package ``scorer.phantom.bundled``.
    """
    local = PHANTOM_DIR / DEFAULT_LAYOUT_NAME
    if local.is_file():
        return local
    from importlib import resources

    try:
        return Path(str(resources.files("scorer.phantom.bundled").joinpath(DEFAULT_LAYOUT_NAME)))
    except ModuleNotFoundError:  # pragma: no cover - an install without the bundled layouts
        raise LimenError(
            "the bundled phantom layout is missing from this installation; give --layout FILE", DEFAULT_LAYOUT_NAME
        ) from None


def load_layout(path: str | os.PathLike[str] | None = None) -> Layout:
    """Read and validate a layout file (default: the bundled demo phantom).

    Raises
    ------
    LimenError
        Naming the file, the entry and the problem, for any malformed content.
    """
    path = Path(path) if path is not None else default_layout_path()
    return parse_layout(read_toml(path, "layout file"), path)


def parse_layout(data: dict[str, Any], path: str | os.PathLike[str] = "<layout>") -> Layout:
    """Validate a layout already parsed from TOML into a dict."""
    p = str(path)

    def fail(entry: str, problem: str) -> NoReturn:
        raise LimenError(f"{entry}: {problem}", p)

    def unknown(keys: Iterable[str], allowed: set[str], entry: str) -> None:
        extra = sorted(set(keys) - allowed)
        if extra:
            fail(entry, f"unknown key {extra[0]!r} (allowed: {', '.join(sorted(allowed))})")

    def number(d: dict[str, Any], key: str, entry: str, positive: bool = False) -> float:
        if key not in d:
            fail(entry, f"missing '{key}'")
        v = d[key]
        if isinstance(v, bool) or not isinstance(v, (int, float)) or not np.isfinite(v):
            fail(entry, f"'{key}' must be a number, got {v!r}")
        if positive and v <= 0:
            fail(entry, f"'{key}' must be positive, got {v!r}")
        return float(v)

    def point(v: object, entry: str, key: str) -> tuple[float, float]:
        if (
            not isinstance(v, list)
            or len(v) != 2
            or not all(isinstance(c, (int, float)) and not isinstance(c, bool) for c in v)
        ):
            fail(entry, f"'{key}' must be a pair [x_mm, y_mm], got {v!r}")
        return (float(v[0]), float(v[1]))

    unknown(data, _TOP_KEYS, "top level")
    fmt = data.get("format")
    if fmt != FORMAT:
        fail("format", f'expected format = "{FORMAT}", got {fmt!r}')
    ph = data.get("phantom")
    if not isinstance(ph, dict):
        fail("[phantom]", "missing table")
    unknown(ph, _PHANTOM_KEYS, "[phantom]")
    width = number(ph, "width_mm", "[phantom]", positive=True)
    height = number(ph, "height_mm", "[phantom]", positive=True)
    name = str(ph.get("name", Path(p).stem))

    def inside(xy: tuple[float, float], r: float, entry: str) -> None:
        x, y = xy
        if x - r < 0 or y - r < 0 or x + r > width or y + r > height:
            fail(
                entry, f"site ({x:g}, {y:g}) mm with radius {r:g} mm lies outside the {width:g} × {height:g} mm outline"
            )

    def marker(d: object, entry: str) -> Marker:
        if not isinstance(d, dict):
            fail(entry, "must be a table")
        unknown(d, _MARKER_KEYS, entry)
        diam = number(d, "diameter_mm", entry, positive=True)
        c = number(d, "contrast", entry)
        if not 0 < c < 1:
            fail(entry, f"contrast must lie in (0, 1), got {c:g}")
        m = Marker(str(d.get("id", entry)), number(d, "x_mm", entry), number(d, "y_mm", entry), diam, c)
        inside(m.xy_mm, diam / 2, entry)
        return m

    fid_raw = data.get("fiducials", [])
    if not isinstance(fid_raw, list) or len(fid_raw) < 3:
        fail(
            "[[fiducials]]",
            f"at least three fiducial markers are needed, found {len(fid_raw) if isinstance(fid_raw, list) else 0}",
        )
    fiducials = tuple(
        marker(d, f"fiducial {d.get('id', i) if isinstance(d, dict) else i}") for i, d in enumerate(fid_raw)
    )
    if "orientation_key" not in data:
        fail("[orientation_key]", "missing table (one marker that breaks the plate's symmetry)")
    key = marker(data["orientation_key"], "orientation_key")
    fid_d = {m.diameter_mm for m in fiducials}
    if key.diameter_mm in fid_d:
        fail("orientation_key", "must differ in diameter from the fiducials so it can be told apart")

    t_raw = data.get("targets", [])
    if not isinstance(t_raw, list) or not t_raw:
        fail("[[targets]]", "no targets")
    n_sites = sum(
        len(d.get("sites_mm") or []) + len(d.get("background_sites_mm") or []) + ("known_site_mm" in d)
        if isinstance(d, dict)
        and isinstance(d.get("sites_mm", []), list)
        and isinstance(d.get("background_sites_mm", []), list)
        else 1
        for d in t_raw
    )
    check_limit(
        "LIMEN_MAX_LAYOUT_SITES", n_sites, f"[[targets]]: {len(t_raw)} targets with {n_sites} candidate sites", p
    )
    targets: list[Target] = []
    seen_ids: set[str] = set()
    for i, d in enumerate(t_raw):
        entry = f"target {d.get('id', i) if isinstance(d, dict) else i!r}"
        if not isinstance(d, dict):
            fail(entry, "must be a table")
        unknown(d, _TARGET_KEYS, entry)
        tid = str(d.get("id", f"t{i}"))
        if tid in seen_ids:
            fail(entry, "duplicate id")
        seen_ids.add(tid)
        diam = number(d, "diameter_mm", entry)
        if diam <= 0:
            fail(entry, f"diameter_mm must be positive, got {diam:g}")
        c = number(d, "contrast", entry)
        if not 0 < c < 1:
            fail(entry, f"contrast must lie in (0, 1), got {c:g}")
        if "sites_mm" in d:
            if "known_site_mm" in d or "background_sites_mm" in d:
                fail(entry, "give either sites_mm + signal_site or known_site_mm + background_sites_mm, not both")
            raw = d["sites_mm"]
            if not isinstance(raw, list) or len(raw) < 2:
                fail(entry, "sites_mm needs at least two candidate sites")
            sites = tuple(point(v, entry, "sites_mm") for v in raw)
            if "signal_site" not in d:
                fail(entry, "missing 'signal_site' (index of the site holding the disc, from 0)")
            s = d["signal_site"]
            if isinstance(s, bool) or not isinstance(s, int) or not 0 <= s < len(sites):
                fail(entry, f"signal_site {s!r} is out of range 0..{len(sites) - 1}")
            design: TargetDesign = "mafc"
        elif "known_site_mm" in d:
            bg = d.get("background_sites_mm")
            if not isinstance(bg, list) or not bg:
                fail(entry, "background_sites_mm needs at least one site")
            sites = (point(d["known_site_mm"], entry, "known_site_mm"),) + tuple(
                point(v, entry, "background_sites_mm") for v in bg
            )
            s, design = 0, "known"
        else:
            fail(entry, "needs sites_mm + signal_site, or known_site_mm + background_sites_mm")
        for xy in sites:
            inside(xy, diam / 2, entry)
        thick = d.get("thickness_um")
        if thick is not None:
            thick = number(d, "thickness_um", entry, positive=True)
        targets.append(
            Target(tid, diam, c, sites, s, design, None if d.get("material") is None else str(d["material"]), thick)
        )

    _check_overlaps(targets, fiducials + (key,), fail)
    return Layout(name, width, height, fiducials, key, tuple(targets), str(ph.get("description", "")), p)


def _check_overlaps(targets: Sequence[Target], markers: Sequence[Marker], fail: Callable[[str, str], NoReturn]) -> None:
    """No two sites (or a site and a marker) may be closer than their radii plus clearance."""
    xy_list: list[tuple[float, float]] = []
    radius_list: list[float] = []
    owner: list[str] = []
    for t in targets:
        for k, s in enumerate(t.sites_mm):
            xy_list.append(s)
            radius_list.append(t.diameter_mm / 2)
            owner.append(f"target {t.id!r} site {k}")
    for m in markers:
        xy_list.append(m.xy_mm)
        radius_list.append(m.diameter_mm / 2)
        owner.append(f"marker {m.id!r}")
    xy = np.asarray(xy_list)
    radius = np.asarray(radius_list)
    from scipy.spatial import cKDTree

    tree = cKDTree(xy)
    # a pair (i, j) with r_i ≥ r_j clashes only within (2 + clearance)·r_i of i: each item queries its own reach
    # and keeps partners no larger than itself, so the work and memory grow with the sites, not their square
    reach = (2 + SITE_CLEARANCE_RADII) * radius
    worst: tuple[tuple[int, int], float, float] | None = None
    for i, near in enumerate(tree.query_ball_point(xy, reach)):
        for j in near:
            if j == i or radius[j] > radius[i] or (radius[j] == radius[i] and j < i):
                continue
            need = radius[i] + radius[j] + SITE_CLEARANCE_RADII * max(radius[i], radius[j])
            dist = float(np.hypot(*(xy[i] - xy[j])))
            if dist < need:
                pair = (min(i, j), max(i, j))
                if worst is None or pair < worst[0]:
                    worst = (pair, dist, need)
    if worst is not None:
        (i, j), dist, need = worst
        fail(owner[j], f"overlaps {owner[i]}: centres {dist:.2f} mm apart, need at least {need:.2f} mm")
