"""The one place that reads files for the core: paths ─► Image, Layout, limits, MTF, … ─► the pure packages.

``observer``, ``detector`` and ``study`` take data and return data; this package reads the files they need
and calls them.  The commands (``scorer.commands``), the web app (``webapp``) and nightly (``scorer.qc``)
call it; the image-format parsers stay in ``scorer.images`` and the layout parser in ``scorer.phantom``,
and outside them only this package and the commands call those (tests/test_layering.py keeps it so).

Modules: ``inputs`` (layout, conversion, images, limits, human/model factor, MTF, kerma CSV), ``scoring``
(score_files: image files → ``scorer.observer.score_images``), ``dose`` (dose series from files),
``detector`` (flat/edge files → ``scorer.detector.measure_detector``; the beam-quality table), ``results``
(the detector, score and dose-series JSON Limen writes), ``simulated`` (detector-model files, simulated
images and their sidecars), ``headers`` (image metadata from a file's header, for nightly's inbox),
``trials`` (a reader-study trial table from a CSV file).

May import: ``scorer.detector``, ``scorer.study``, ``scorer.observer``, ``scorer.phantom``,
``scorer.images`` and the base modules; never ``scorer.qc``, ``scorer.reports`` or ``scorer.commands``.
"""

import lazy_loader as _lazy

# Public names are listed in __init__.pyi and imported on first use (Scientific Python SPEC 1).
__getattr__, __dir__, __all__ = _lazy.attach_stub(__name__, __file__)
