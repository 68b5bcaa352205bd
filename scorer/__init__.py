"""Limen: contrast-detail scoring, detector physics and reader-study statistics.

All computation lives in this package; the ``limen`` command line
(:mod:`scorer.cli`) and the web app stay thin layers over it.
"""

__version__ = "0.1.0"
