"""Public entry points of this package (read by lazy_loader.attach_stub and type checkers)."""

from . import disc as disc
from . import geometry as geometry
from . import layout as layout
from . import registration as registration
from .disc import disc_coverage as disc_coverage
from .disc import disc_coverage_patch as disc_coverage_patch
from .geometry import PhantomTransform as PhantomTransform
from .layout import (
    Layout as Layout,
)
from .layout import (
    Marker as Marker,
)
from .layout import (
    Target as Target,
)
from .layout import (
    default_layout_path as default_layout_path,
)
from .layout import (
    load_layout as load_layout,
)
from .layout import (
    parse_layout as parse_layout,
)
from .registration import (
    Placement as Placement,
)
from .registration import (
    RegistrationError as RegistrationError,
)
from .registration import (
    fit_similarity as fit_similarity,
)
from .registration import (
    register as register,
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
