"""Workflow: the layer that reads files for the core (detector and study), so the packages below it compute
on tables and arrays and never open a file.

Modules: ``trials`` (a reader-study trial table from a CSV file).

May import: ``scorer.detector``, ``scorer.study``, every package below them and the base modules; never
``scorer.qc``, ``scorer.reports`` or ``scorer.commands``.
"""

import lazy_loader as _lazy

# Public names are listed in __init__.pyi and imported on first use (Scientific Python SPEC 1).
__getattr__, __dir__, __all__ = _lazy.attach_stub(__name__, __file__)
