"""Public entry points of this package (read by lazy_loader.attach_stub and type checkers)."""

from . import disc as disc
from . import geometry as geometry
from . import layout as layout
from . import registration as registration

from .layout import (
    Layout as Layout,
    Target as Target,
    Marker as Marker,
    load_layout as load_layout,
    parse_layout as parse_layout,
    default_layout_path as default_layout_path,
)
from .geometry import PhantomTransform as PhantomTransform
from .disc import disc_coverage as disc_coverage, disc_coverage_patch as disc_coverage_patch
from .registration import (
    Placement as Placement,
    RegistrationError as RegistrationError,
    register as register,
    fit_similarity as fit_similarity,
)

__all__ = [
    "disc",
    "geometry",
    "layout",
    "registration",
    "Layout",
    "Target",
    "Marker",
    "load_layout",
    "parse_layout",
    "default_layout_path",
    "PhantomTransform",
    "disc_coverage",
    "disc_coverage_patch",
    "Placement",
    "RegistrationError",
    "register",
    "fit_similarity",
]
