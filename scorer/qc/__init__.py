"""Nightly scoring: an inbox of phantom images scored once, stored safely, trended against baselines, alerted.

Modules: ``config`` (the ``limen-nightly/1`` per-detector configuration), ``inbox`` (scan, read,
session grouping, quarantine), ``store`` (the database: ``Store`` and ``open_store``) with
``tables`` (SQLAlchemy models), ``engine`` (URL, connection), ``schema`` (version, migrations),
``intake`` (file cache, images, quarantine log), ``claims`` (database-level claims), ``results``
(one-transaction writes of a scored session), ``baselines`` and ``queries`` (reading results);
``control`` (baselines, Shewhart and EWMA rules → alerts), ``scale`` (scoring sessions serially,
on a process pool or on a Dask cluster), ``mail`` (alert e-mail over SMTP), ``nightly``
(run_nightly: the whole run as one call), ``simulated`` (simulated nights for the demo and
tests), ``faults`` (fault injection for the crash tests).

May import: ``scorer.workflow`` (every image, layout, limits, conversion and MTF file is read through it),
``scorer.images``, ``scorer.phantom``, ``scorer.observer``, ``scorer.detector``, ``scorer.study`` and the base
modules; never ``scorer.reports`` or ``scorer.commands``.
"""

import lazy_loader as _lazy

# Public names are listed in __init__.pyi and imported on first use (Scientific Python SPEC 1).
__getattr__, __dir__, __all__ = _lazy.attach_stub(__name__, __file__)
