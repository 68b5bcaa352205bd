"""Image metadata from a file without decoding its pixels where the header suffices (nightly's inbox scan).

A DICOM file whose header is sound (pixel data present and, when not encapsulated, ending within the file)
is described from its header alone; anything else is read fully by :func:`scorer.images.loading.load_image`,
whose one-line error names the problem.
"""

from __future__ import annotations

import warnings
from pathlib import Path

from scorer.files import PathArg
from scorer.images.dicom_tags import fill_dicom_metadata
from scorer.images.image import ImageMetadata, LimenWarning
from scorer.images.loading import load_image

_PIXEL_TAGS = (0x7FE00010, 0x7FE00008, 0x7FE00009)  # Pixel Data, Float / Double Float Pixel Data


def read_image_metadata(path: PathArg) -> ImageMetadata:
    """The metadata of an image file: from the DICOM header alone when it is sound, else from a full read
    (whose :class:`~scorer.errors.LimenError` names the problem; its warnings are not shown).

    Parameters
    ----------
    path : str or path-like
        The image file.

    Returns
    -------
    ImageMetadata
    """
    path = Path(path)
    md = _quick_metadata(path)
    if md is None:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", LimenWarning)
            md = load_image(path).metadata
    return md


def _quick_metadata(path: Path) -> ImageMetadata | None:
    """ImageMetadata from the DICOM header without decoding pixels, or None when a full read must judge.

    The pixel data element must be present and, when not encapsulated, end within the file; a file
    that fails either (or is not plainly DICOM) goes to ``load_image`` for its one-line error.
    """
    import pydicom
    from pydicom.tag import BaseTag

    try:
        with path.open("rb") as fh:
            head = fh.read(132)
        if len(head) < 132 or head[128:132] != b"DICM":
            return None
        size = path.stat().st_size
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            ds = pydicom.dcmread(path, defer_size="256 KB")
        tags = [BaseTag(t) for t in _PIXEL_TAGS]
        raw = next((ds._dict[t] for t in tags if t in ds._dict), None)
        if raw is None:
            return None
        length, tell = getattr(raw, "length", None), getattr(raw, "value_tell", None)
        if length is None or tell is None or (length != 0xFFFFFFFF and tell + length > size):
            return None
        if any(int(ds.get(k) or 1) > 1 for k in ("SamplesPerPixel", "NumberOfFrames")):
            return None
        meta = ImageMetadata(source_path=str(path), file_format="dicom")
        fill_dicom_metadata(ds, meta)  # the same tags load_image reads
        return meta
    except Exception:  # any oddity: let load_image judge and explain
        return None


def read_acquisition_extras(path: PathArg) -> dict[str, str | None]:
    """Anode Target Material (0018,1191), Filter Material (0018,7050) and Content Date (0008,0023) of a DICOM
    file (``anode``, ``filter``, ``content_date`` as YYYY-MM-DD); empty when the header cannot be read.

    Parameters
    ----------
    path : str or path-like
        The DICOM file.

    Returns
    -------
    dict of str to str or None
        ``anode``, ``filter`` and ``content_date``, those the header gives.
    """
    import pydicom

    out: dict[str, str | None] = {}
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            ds = pydicom.dcmread(path, stop_before_pixels=True, force=True)
    except Exception:  # load_image has read the file already; a header it could read is readable
        return out
    for key, kw in (("anode", "AnodeTargetMaterial"), ("filter", "FilterMaterial")):
        v = ds.get(kw)
        if v:
            text = "\\".join(str(x) for x in v) if not isinstance(v, str) and hasattr(v, "__iter__") else str(v)
            out[key] = text.strip().upper() or None

    cd = str(ds.get("ContentDate") or "").strip()
    if len(cd) == 8 and cd.isdigit():
        out["content_date"] = f"{cd[:4]}-{cd[4:6]}-{cd[6:]}"
    return out
