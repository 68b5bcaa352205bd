"""Public entry points of this package (read by lazy_loader.attach_stub and type checkers)."""

from . import trials as trials

from .trials import load_trials as load_trials

__all__ = [
    "trials",
    "load_trials",
]
