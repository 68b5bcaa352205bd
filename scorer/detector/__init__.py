"""Detector physics: conversion function, MTF, NNPS, DQE, the predicted contrast-detail curve,
the panel simulator and the side-by-side comparison of two panels.

Modules: ``mtf`` (slanted edge), ``nnps`` (flat fields), ``measure`` (conversion fit, DQE, the whole
measurement), ``noise`` (noise components), ``predict`` (Fourier NPW/NPWE prediction), ``simulator``
(direct/indirect panels), ``dose`` (the dose axis), ``comparison`` (two panels side by side).

Data in, data out: nothing here reads a file (``scorer.workflow`` reads flat, edge and phantom images,
detector/score/dose-series JSON and model files, and writes simulated images; tests/test_layering.py
keeps it so).

May import: ``scorer.observer``, ``scorer.phantom``, ``scorer.images`` (never its file readers) and the
base modules (never ``scorer.study``, which sits beside it).
"""

import lazy_loader as _lazy

# Public names are listed in __init__.pyi and imported on first use (Scientific Python SPEC 1).
__getattr__, __dir__, __all__ = _lazy.attach_stub(__name__, __file__)
