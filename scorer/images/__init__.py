"""Image files in, one :class:`Image` out: pixels linear in air kerma, spacing and metadata.

Modules: ``image`` (Image, ImageMetadata, LimenWarning), ``loading`` (load_image, content hash), which uses
``formats`` (format sniffing, size from headers), ``dicom_reader``, ``raster_readers`` (TIFF, PNG, .npy),
``dicom_tags`` (metadata, direction of the pixel values), ``spacing``, ``dates`` and ``messages``;
``writers`` (write_dicom, write_image); ``conversion`` (conversion functions pixel value ↔ air kerma and their
TOML file).

May import: ``scorer.errors``, ``scorer.files`` only (the bottom layer).
"""

import lazy_loader as _lazy

# Public names are listed in __init__.pyi and imported on first use (Scientific Python SPEC 1).
__getattr__, __dir__, __all__ = _lazy.attach_stub(__name__, __file__)
