"""Public entry points of this package (read by lazy_loader.attach_stub and type checkers)."""

from . import conversion as conversion
from . import image as image
from . import loading as loading
from . import writers as writers
from .conversion import (
    ConversionFunction as ConversionFunction,
)
from .conversion import (
    load_conversion as load_conversion,
)
from .conversion import (
    save_conversion as save_conversion,
)
from .image import Image as Image
from .image import ImageMetadata as ImageMetadata
from .image import LimenWarning as LimenWarning
from .loading import (
    image_content_hash as image_content_hash,
)
from .loading import (
    load_image as load_image,
)
from .writers import (
    write_dicom as write_dicom,
)
from .writers import (
    write_image as write_image,
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
