"""Reader-study statistics: per-reader and pooled human curves, the human/model factor, detector
comparison, agreement, and the documented model of simulated readers.

Modules: ``analysis`` (analyse_study: every analysis as one call, and its result), ``trials`` (the trial
table's columns and validate_trials), ``alternatives`` (M and the threshold criterion per diameter),
``counts`` (trial counts per reader × image × level), ``reader_fits`` (per-reader curves, between-reader CV),
``pooled_gee`` (pooled curve, GEE with reader clusters), ``human_factor`` (human/model factor,
Bland–Altman), ``group_comparison`` (mixed model between detectors), ``wording`` (plain sentences),
``agreement`` (kappa, intra/inter-reader), ``reader_model`` (simulated readers), ``planning`` (study size by
simulation). Reading trial tables from files is ``scorer.workflow``'s job.

May import: ``scorer.observer``, ``scorer.phantom``, ``scorer.images`` and the base modules
(never ``scorer.detector``, which sits beside it, nor ``scorer.workflow``, which sits above).
"""

import lazy_loader as _lazy

# Public names are listed in __init__.pyi and imported on first use (Scientific Python SPEC 1).
__getattr__, __dir__, __all__ = _lazy.attach_stub(__name__, __file__)
