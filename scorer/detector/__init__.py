"""Detector physics: conversion function, MTF, NNPS, DQE, the predicted contrast-detail curve,
the panel simulator and the side-by-side comparison of two panels.

Modules: ``mtf`` (slanted edge), ``nnps`` (flat fields), ``measure`` (conversion fit, DQE, the whole
measurement), ``predict`` (Fourier NPW/NPWE prediction), ``simulate`` (direct/indirect panels),
``compare`` (two panels side by side).

May import: ``scorer.observer``, ``scorer.phantom``, ``scorer.images`` and the base modules
(never ``scorer.study``, which sits beside it).
"""

import lazy_loader as _lazy

# Public names are listed in __init__.pyi and imported on first use (Scientific Python SPEC 1).
__getattr__, __dir__, __all__ = _lazy.attach_stub(__name__, __file__)
