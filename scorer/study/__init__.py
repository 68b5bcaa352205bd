"""Reader-study statistics: per-reader and pooled human curves, the human/model factor, detector
comparison, agreement, and the documented model of simulated readers.

Modules: ``stats`` (analyse_study and its parts), ``agreement`` (kappa, intra/inter-reader),
``reader_model`` (simulated readers).

May import: ``scorer.observer``, ``scorer.phantom``, ``scorer.images`` and the base modules
(never ``scorer.detector``, which sits beside it).
"""

import lazy_loader as _lazy

# Public names are listed in __init__.pyi and imported on first use (Scientific Python SPEC 1).
__getattr__, __dir__, __all__ = _lazy.attach_stub(__name__, __file__)
