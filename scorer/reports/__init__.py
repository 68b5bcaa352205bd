"""Reports: results → self-contained HTML pages with plots, JSON and CSV.

Modules: ``html`` (page frame with the caution, SVG figures, tables, JSON helpers), ``overlay``
(registration overlay PNG), ``score`` (``limen score``), ``detector`` (``limen detector``,
``limen compare-detectors``), ``study`` (``limen analyse``).

May import: every computing package below it (images, phantom, observer, detector, study, qc);
computes nothing itself.
"""

import lazy_loader as _lazy

# Public names are listed in __init__.pyi and imported on first use (Scientific Python SPEC 1).
__getattr__, __dir__, __all__ = _lazy.attach_stub(__name__, __file__)
