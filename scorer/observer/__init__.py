"""The model observer and what follows from its responses: thresholds, limits, verdicts.

Modules: ``npw`` (NPW/NPWE responses, M-AFC decisions), ``eye`` (eye filter), ``mafc`` (Pc(d′) for
M-AFC), ``mafc_fast`` (tabulated Pc_M, batch fits of k), ``psychometric`` (ML fits),
``psychometric_bootstrap`` (threshold with a bootstrap CI), ``bootstrap`` (resampling weights,
percentile intervals), ``threshold`` (d′ and count methods → ThresholdCurve), ``limits`` (limits
(limits, verdicts), ``scoring`` (score_images: the main job on Image objects).

Data in, data out: nothing here reads a file (``scorer.workflow`` reads image, limits, MTF and
human/model factor files and calls these functions; tests/test_layering.py keeps it so).

May import: ``scorer.phantom``, ``scorer.images`` (never its file readers) and the base modules.
"""

import lazy_loader as _lazy

# Public names are listed in __init__.pyi and imported on first use (Scientific Python SPEC 1).
__getattr__, __dir__, __all__ = _lazy.attach_stub(__name__, __file__)
