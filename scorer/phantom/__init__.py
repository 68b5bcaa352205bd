"""The phantom: its layout file, the mm ↔ pixel geometry, disc rendering and registration.

Modules: ``layout`` (the ``limen-layout/1`` TOML format), ``geometry`` (PhantomTransform),
``disc`` (sub-pixel disc coverage), ``register`` (Image + Layout → Placement, overlays).

May import: ``scorer.images`` and the base modules.
"""

import lazy_loader as _lazy

# Public names are listed in __init__.pyi and imported on first use (Scientific Python SPEC 1).
__getattr__, __dir__, __all__ = _lazy.attach_stub(__name__, __file__)
