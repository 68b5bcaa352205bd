"""Public entry points of this package (read by lazy_loader.attach_stub and type checkers)."""

from . import conversion as conversion
from . import image as image
from . import loading as loading
from . import writers as writers

from .image import Image as Image, ImageMetadata as ImageMetadata, LimenWarning as LimenWarning
from .loading import (
    load_image as load_image,
    image_content_hash as image_content_hash,
)
from .writers import (
    write_dicom as write_dicom,
    write_image as write_image,
)
from .conversion import (
    ConversionFunction as ConversionFunction,
    load_conversion as load_conversion,
    save_conversion as save_conversion,
)

__all__ = [
    "conversion",
    "image",
    "loading",
    "writers",
    "Image",
    "ImageMetadata",
    "LimenWarning",
    "load_image",
    "write_dicom",
    "write_image",
    "image_content_hash",
    "ConversionFunction",
    "load_conversion",
    "save_conversion",
]
