"""Tests for reading and writing detector images (scorer.images.loading, .writers and the modules they use).

Outside references used below:
* DICOM PS3.3 (tags and their meaning), PS3.4 Annex B (storage SOP class UIDs),
  PS3.5 Annex A (transfer syntax UIDs) and 6.2 (DT/DA/TM value representations),
  PS3.10 7.1 (file meta information) — checked with pydicom's own reader and
  ``validate_file_meta``.
* Independent readers of what we write: pydicom with a named decoding plugin,
  tifffile's page tags, Pillow for PNG bit depth.
* FIPS 180-2 appendix B.1: SHA-256("abc").
* The analytic inverse of each conversion function (scorer.images.conversion docstring):
  linear PV = offset + gain·K, logarithmic PV = offset + gain·ln K.
"""

from __future__ import annotations

import hashlib
import warnings
from pathlib import Path

import numpy as np
import pydicom
import pytest
from pydicom.dataset import FileDataset, FileMetaDataset, validate_file_meta
from pydicom.uid import UID, ExplicitVRLittleEndian, generate_uid

from scorer.errors import LimenError
from scorer.images import ConversionFunction
from scorer.images.dates import dicom_datetime_to_iso
from scorer.images.image import LimenWarning
from scorer.images.loading import image_content_hash, load_image
from scorer.images.writers import SOP_CLASS_DX_FOR_PROCESSING, SOP_CLASS_MG_FOR_PROCESSING, write_dicom, write_image

# An invented scenario: station, detector and serial belong to no real site.
TAGS = {
    "Modality": "MG",
    "PresentationIntentType": "FOR PROCESSING",
    "DetectorType": "DIRECT",
    "KVP": 28,
    "ExposureInuAs": 80000,
    "DetectorID": "ALDER-SE-0042",
    "DeviceSerialNumber": "NV-77103",
    "StationName": "NORTHVALE_MAMMO2",
    "Manufacturer": "Invented Imaging Works",
    "EstimatedRadiographicMagnificationFactor": 1.08,
    "AcquisitionDateTime": "20261130083000",
}


def _pixels(shape=(48, 64), bits=14, seed=7) -> np.ndarray:
    """Random uint16 pixels covering the full range of ``bits`` (0 and the maximum included)."""
    rng = np.random.default_rng(seed)
    px = rng.integers(0, 1 << bits, size=shape, dtype=np.uint16)
    px[0, 0], px[-1, -1] = 0, (1 << bits) - 1
    return px


def _assert_one_line_naming(exc_info, path) -> str:
    msg = str(exc_info.value)
    assert "\n" not in msg and "\r" not in msg
    assert str(path) in msg
    return msg


def _edit_dicom(src: Path, dst: Path, **changes) -> Path:
    """Re-save a DICOM file with elements changed (value None deletes)."""
    ds = pydicom.dcmread(src)
    for key, value in changes.items():
        if value is None:
            delattr(ds, key)
        else:
            setattr(ds, key, value)
    ds.save_as(dst, enforce_file_format=True)
    return dst


# ----------------------------------------------------------------------------- round trips


# PS3.5 Annex A transfer syntax UIDs.
@pytest.mark.parametrize(
    "syntax, uid",
    [
        ("explicit-little", "1.2.840.10008.1.2.1"),
        ("jpeg-ls-lossless", "1.2.840.10008.1.2.4.80"),
        ("jpeg2000-lossless", "1.2.840.10008.1.2.4.90"),
    ],
)
def test_dicom_round_trip_is_bit_exact_with_metadata(tmp_path, syntax, uid):
    px = _pixels()
    path = write_dicom(tmp_path / f"mg_{syntax}.dcm", px, (0.085, 0.085), tags=TAGS, transfer_syntax=syntax)

    # The file as pydicom (reference reader) sees it: PS3.10 file meta, PS3.4 SOP class.
    ds = pydicom.dcmread(path)
    validate_file_meta(ds.file_meta, enforce_standard=True)
    assert ds.file_meta.TransferSyntaxUID == uid
    assert ds.file_meta.TransferSyntaxUID.is_encapsulated == (syntax != "explicit-little")
    assert ds.SOPClassUID == SOP_CLASS_MG_FOR_PROCESSING == "1.2.840.10008.5.1.4.1.1.1.2.1"
    assert ds.file_meta.MediaStorageSOPInstanceUID == ds.SOPInstanceUID
    assert ds.PhotometricInterpretation == "MONOCHROME2"  # (0028,0004)
    assert (ds.BitsAllocated, ds.BitsStored, ds.HighBit, ds.PixelRepresentation) == (16, 14, 13, 0)
    assert [float(v) for v in ds.ImagerPixelSpacing] == [0.085, 0.085]  # (0018,1164)

    img = load_image(path)
    # Lossless means bit-exact.
    assert img.pixels.dtype == np.float64
    assert np.array_equal(img.pixels, px.astype(np.float64))
    assert img.spacing_mm == (0.085, 0.085)
    m = img.metadata
    assert m.file_format == "dicom"
    assert m.spacing_source == "Imager Pixel Spacing (0018,1164)"
    assert m.modality == "MG"  # (0008,0060)
    assert m.presentation_intent == "FOR PROCESSING"  # (0008,0068)
    assert m.detector_type == "DIRECT"  # (0018,7004)
    assert m.kvp == 28.0  # (0018,0060)
    assert m.exposure_uas == 80000.0  # (0018,1153)
    assert m.detector_id == "ALDER-SE-0042"  # (0018,700A)
    assert m.device_serial == "NV-77103"  # (0018,1000)
    assert m.station_name == "NORTHVALE_MAMMO2"  # (0008,1010)
    assert m.manufacturer == "Invented Imaging Works"  # (0008,0070)
    assert m.magnification_factor == pytest.approx(1.08)  # (0018,1114)
    assert m.acquisition_datetime == "2026-11-30T08:30:00"  # (0008,002A) DT → ISO 8601
    assert m.content_sha256 == hashlib.sha256(path.read_bytes()).hexdigest()
    assert m.source_path == str(path)
    assert not m.linearised and m.warnings == []


@pytest.mark.parametrize("syntax", ["jpeg-ls-lossless", "jpeg2000-lossless"])
def test_compressed_dicom_decodes_bit_exact_with_pylibjpeg_plugins(tmp_path, syntax):
    # The declared decoders are pylibjpeg-libjpeg (JPEG-LS) and pylibjpeg-openjpeg (JPEG 2000):
    # force pydicom to use the pylibjpeg plugin, whatever other plugins are installed.
    from pydicom.pixels import pixel_array

    px = _pixels(seed=3)
    path = write_dicom(tmp_path / "c.dcm", px, (0.1, 0.1), tags={"Modality": "MG"}, transfer_syntax=syntax)
    arr = pixel_array(path, decoding_plugin="pylibjpeg")
    assert np.array_equal(arr, px)


def test_rle_and_implicit_round_trip(tmp_path):
    px = _pixels(bits=16, seed=5)
    for syntax, uid in (("rle-lossless", "1.2.840.10008.1.2.5"), ("implicit-little", "1.2.840.10008.1.2")):
        path = write_dicom(
            tmp_path / f"{syntax}.dcm", px, (0.07, 0.07), tags={"BitsStored": 16}, transfer_syntax=syntax
        )
        assert pydicom.dcmread(path).file_meta.TransferSyntaxUID == uid  # PS3.5 Annex A
        assert np.array_equal(load_image(path).pixels, px)


def test_non_mg_modality_gets_dx_sop_class(tmp_path):
    path = write_dicom(tmp_path / "dx.dcm", _pixels(), (0.14, 0.14), tags={"Modality": "DX"})
    ds = pydicom.dcmread(path)
    # PS3.4 B.5: Digital X-Ray Image Storage – For Processing.
    assert ds.SOPClassUID == SOP_CLASS_DX_FOR_PROCESSING == "1.2.840.10008.5.1.4.1.1.1.1.1"
    assert ds.file_meta.MediaStorageSOPClassUID == ds.SOPClassUID
    assert ds.Modality == "DX"


def test_tiff_16_bit_round_trip(tmp_path):
    import tifffile

    px = _pixels(bits=16)
    path = write_image(tmp_path / "flat.tiff", px)
    with tifffile.TiffFile(path) as tif:  # independent check: one 16-bit grey page
        page = tif.pages[0]
        assert len(tif.pages) == 1 and page.bitspersample == 16 and page.samplesperpixel == 1
    img = load_image(path, pixel_spacing_mm=(0.1, 0.12))
    assert np.array_equal(img.pixels, px)
    assert img.spacing_mm == (0.1, 0.12)
    assert img.metadata.file_format == "tiff" and img.metadata.spacing_source == "argument"
    assert img.metadata.content_sha256 == image_content_hash(path)


@pytest.mark.parametrize("dtype, bit_depth", [(np.uint16, 16), (np.uint8, 8)])
def test_png_grey_round_trip(tmp_path, dtype, bit_depth):
    from PIL import Image as PILImage

    px = _pixels(bits=bit_depth).astype(dtype)
    path = write_image(tmp_path / "grey.png", px)
    with PILImage.open(path) as im:  # independent check of the PNG header: grey, 8 or 16 bits
        assert im.mode in (("I;16", "I;16B", "I") if bit_depth == 16 else ("L",))
        assert im.size == (px.shape[1], px.shape[0])
    img = load_image(path, pixel_spacing_mm=0.05)
    assert np.array_equal(img.pixels, px)
    assert img.spacing_mm == (0.05, 0.05)
    assert img.metadata.file_format == "png"


def test_npy_round_trip_keeps_float_values(tmp_path):
    rng = np.random.default_rng(11)
    px = rng.normal(100.0, 3.0, size=(40, 30))
    path = write_image(tmp_path / "k.npy", px)
    img = load_image(path, pixel_spacing_mm=(0.085, 0.085))
    assert np.array_equal(img.pixels, px)
    assert img.metadata.file_format == "npy"


def test_single_frame_stack_is_accepted(tmp_path):
    px = _pixels()[None, :, :]
    np.save(tmp_path / "one.npy", px)
    assert load_image(tmp_path / "one.npy", pixel_spacing_mm=0.1).shape == px.shape[1:]


def test_format_is_recognised_from_content_not_extension(tmp_path):
    # A DICOM file named without extension, as PACS exports often are (PS3.10 7.1: "DICM" at byte 128).
    px = _pixels()
    src = write_dicom(tmp_path / "a.dcm", px, (0.1, 0.1))
    noext = tmp_path / "IM000001"
    noext.write_bytes(src.read_bytes())
    assert np.array_equal(load_image(noext).pixels, px)


def test_dicom_without_preamble_is_read(tmp_path):
    # Older files may lack the 128-byte preamble and "DICM" prefix (PS3.10 7.1).
    px = _pixels()
    src = write_dicom(tmp_path / "a.dcm", px, (0.1, 0.1))
    bare = tmp_path / "bare.dcm"
    bare.write_bytes(src.read_bytes()[132:])
    assert np.array_equal(load_image(bare).pixels, px)


def test_image_content_hash_matches_fips_180_2_vector(tmp_path):
    p = tmp_path / "abc.bin"
    p.write_bytes(b"abc")
    # FIPS 180-2, appendix B.1: SHA-256("abc").
    assert image_content_hash(p) == "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"


# ----------------------------------------------------------------------------- spacing


def test_imager_pixel_spacing_preferred_over_pixel_spacing(tmp_path):
    # PS3.3 C.8.11.4: Imager Pixel Spacing (0018,1164) is at the detector plane; Pixel Spacing
    # (0028,0030) may be calibrated to the object.  Values are (row spacing, column spacing).
    path = write_dicom(tmp_path / "both.dcm", _pixels(), (0.1, 0.05), tags={"PixelSpacing": [0.09, 0.045]})
    img = load_image(path)
    assert img.spacing_mm == (0.1, 0.05)
    assert img.metadata.spacing_source == "Imager Pixel Spacing (0018,1164)"


def test_pixel_spacing_used_when_imager_pixel_spacing_absent(tmp_path):
    path = write_dicom(
        tmp_path / "ps.dcm", _pixels(), (0.1, 0.1), tags={"ImagerPixelSpacing": None, "PixelSpacing": [0.094, 0.047]}
    )
    assert "ImagerPixelSpacing" not in pydicom.dcmread(path)
    img = load_image(path)
    assert img.spacing_mm == (0.094, 0.047)  # (0028,0030): row, then column
    assert img.metadata.spacing_source == "Pixel Spacing (0028,0030)"
    assert any("may be calibrated to the object" in w for w in img.metadata.warnings)


def test_explicit_spacing_overrides_dicom_and_is_recorded(tmp_path):
    path = write_dicom(tmp_path / "o.dcm", _pixels(), (0.085, 0.085))
    img = load_image(path, pixel_spacing_mm=(0.07, 0.07))
    assert img.spacing_mm == (0.07, 0.07)
    assert img.metadata.spacing_source == "argument"
    assert any("0.07×0.07 mm given overrides 0.085×0.085 mm" in w for w in img.metadata.warnings)
    # The same value as the file's: recorded as the source, no note.
    same = load_image(path, pixel_spacing_mm=0.085)
    assert same.metadata.spacing_source == "argument" and same.metadata.warnings == []


# ----------------------------------------------------------------------------- pixel values


def test_rescale_slope_and_intercept_applied(tmp_path):
    # PS3.3 C.11.1.1.2: output units = Rescale Slope (0028,1053) × stored value + Rescale Intercept (0028,1052).
    px = _pixels()
    path = write_dicom(tmp_path / "r.dcm", px, (0.1, 0.1), tags={"RescaleSlope": 0.5, "RescaleIntercept": -100})
    img = load_image(path)
    np.testing.assert_array_equal(img.pixels, 0.5 * px.astype(np.float64) - 100.0)


def test_linear_conversion_matches_analytic_inverse(tmp_path):
    # Linear conversion function PV = offset + gain·K (IEC 62220-1 conversion function, linear kind).
    conv = ConversionFunction("linear", offset=50.0, gain=20.0)
    kerma = np.linspace(0.0, 800.0, 48 * 64).reshape(48, 64)
    pv = np.rint(conv.to_pixel_value(kerma)).astype(np.uint16)
    path = write_dicom(tmp_path / "lin.dcm", pv, (0.085, 0.085), tags={"Modality": "MG"})
    img = load_image(path, conversion=conv)
    np.testing.assert_allclose(img.pixels, (pv.astype(float) - 50.0) / 20.0, rtol=0, atol=1e-12)
    # Rounding the stored value to an integer moves kerma by at most 0.5 / gain µGy.
    assert np.max(np.abs(img.pixels - kerma)) <= 0.5 / 20.0 + 1e-12
    assert img.metadata.linearised
    assert img.metadata.conversion == {"kind": "linear", "offset": 50.0, "gain": 20.0, "source": ""}


def test_logarithmic_conversion_matches_analytic_inverse(tmp_path):
    # PV = offset + gain·ln(K / 1 µGy)  ⇒  K = exp((PV − offset) / gain).
    conv = ConversionFunction("logarithmic", offset=1000.0, gain=500.0, source="test")
    kerma = np.geomspace(1.0, 500.0, 48 * 64).reshape(48, 64)
    pv = np.rint(1000.0 + 500.0 * np.log(kerma)).astype(np.uint16)
    path = write_image(tmp_path / "log.tiff", pv)
    img = load_image(path, pixel_spacing_mm=0.085, conversion=conv)
    np.testing.assert_allclose(img.pixels, np.exp((pv.astype(float) - 1000.0) / 500.0), rtol=1e-14)
    # Half a pixel-value step is a relative kerma error of at most exp(0.5/gain) − 1 ≈ 0.1 %.
    assert np.max(np.abs(img.pixels / kerma - 1.0)) <= np.expm1(0.5 / 500.0) + 1e-12
    assert img.metadata.linearised and img.metadata.conversion["kind"] == "logarithmic"


def test_logarithmic_conversion_to_non_finite_kerma_is_an_error(tmp_path):
    px = np.full((32, 32), 60000, dtype=np.uint16)
    path = write_image(tmp_path / "big.png", px)
    conv = ConversionFunction("logarithmic", offset=0.0, gain=1.0)  # exp(60000) overflows
    with pytest.raises(LimenError) as ei:
        load_image(path, pixel_spacing_mm=0.1, conversion=conv)
    msg = _assert_one_line_naming(ei, path)
    assert "non-finite air kerma" in msg and "1024 pixel" in msg


# ----------------------------------------------------------------------------- metadata


def test_for_presentation_warns(tmp_path):
    # PS3.3 C.8.11.1.1.1: FOR PRESENTATION images are processed for display (not linear).
    path = write_dicom(
        tmp_path / "pres.dcm",
        _pixels(),
        (0.1, 0.1),
        tags={"Modality": "MG", "PresentationIntentType": "FOR PRESENTATION"},
    )
    with pytest.warns(LimenWarning, match="not linear in air kerma") as record:
        img = load_image(path)
    assert str(path) in str(record[0].message)
    assert img.metadata.presentation_intent == "FOR PRESENTATION"
    assert any("not linear in air kerma" in w for w in img.metadata.warnings)


def test_for_processing_does_not_warn(tmp_path):
    path = write_dicom(tmp_path / "proc.dcm", _pixels(), (0.1, 0.1), tags=TAGS)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        load_image(path)


def test_exposure_in_mas_and_separate_date_time(tmp_path):
    # Exposure (0018,1152) is in mAs: ×1000 gives µAs.  AcquisitionDate (0008,0022) DA and
    # AcquisitionTime (0008,0032) TM combine to an ISO 8601 date-time.
    tags = {"Exposure": 63, "AcquisitionDate": "20261201", "AcquisitionTime": "141502.25"}
    img = load_image(write_dicom(tmp_path / "e.dcm", _pixels(), (0.1, 0.1), tags=tags))
    assert img.metadata.exposure_uas == 63000.0
    assert img.metadata.acquisition_datetime == "2026-12-01T14:15:02.25"


@pytest.mark.parametrize(
    "dt",
    [
        "20261130083000",
        "20261130083000.123456",
        "20261130083000+0100",
        "20261130083000.5-0530",
        "20261130",
    ],
)
def test_dicom_datetime_to_iso_agrees_with_python_datetime(dt):
    # PS3.5 6.2 DT: YYYYMMDDHHMMSS.FFFFFF&ZZXX; Python's datetime is the reference parser of the ISO text.
    from datetime import datetime

    iso = dicom_datetime_to_iso(dt)
    parsed = datetime.fromisoformat(iso)
    compact = "%Y%m%d%H%M%S" + (".%f" if "." in dt else "") + ("%z" if ("+" in dt or "-" in dt) else "")
    if len(dt) == 8:
        compact = "%Y%m%d"
    assert parsed == datetime.strptime(dt, compact)


@pytest.mark.parametrize("bad", ["2026113", "20261330", "2026-11-30", "20261130250000", "yesterday"])
def test_dicom_datetime_to_iso_rejects_invalid(bad):
    assert dicom_datetime_to_iso(bad) is None


# ----------------------------------------------------------------------------- bad input


def _mg(tmp_path, name="ok.dcm", syntax="explicit-little", **kw) -> Path:
    return write_dicom(tmp_path / name, _pixels(), (0.1, 0.1), tags={"Modality": "MG"}, transfer_syntax=syntax, **kw)


def _raises(path, match, **kwargs) -> str:
    with pytest.raises(LimenError, match=match) as ei:
        load_image(path, **kwargs)
    return _assert_one_line_naming(ei, path)


def test_missing_file(tmp_path):
    _raises(tmp_path / "nowhere.dcm", "file not found")


def test_directory_and_empty_file(tmp_path):
    _raises(tmp_path, "directory")
    empty = tmp_path / "empty.dcm"
    empty.write_bytes(b"")
    _raises(empty, "empty")


@pytest.mark.parametrize(
    "name, content, match",
    [
        ("notes.dcm", b"this is a text file, not DICOM\n" * 10, "not a DICOM file"),
        ("photo.jpg", b"\xff\xd8\xff\xe0" + b"\0" * 200, "not a recognised image file .*extension '.jpg'"),
        ("README", b"hello", "no extension"),
        ("fake.png", b"GIF89a" + b"\0" * 100, "not a PNG file"),
        ("fake.tif", b"\0" * 100, "not a TIFF file"),
    ],
)
def test_not_an_image(tmp_path, name, content, match):
    p = tmp_path / name
    p.write_bytes(content)
    _raises(p, match, pixel_spacing_mm=0.1)


@pytest.mark.parametrize("syntax", ["explicit-little", "jpeg-ls-lossless"])
@pytest.mark.parametrize("fraction", [0.1, 0.5, 0.999])
def test_truncated_dicom(tmp_path, syntax, fraction):
    src = _mg(tmp_path, syntax=syntax)
    data = src.read_bytes()
    cut = tmp_path / "cut.dcm"
    cut.write_bytes(data[: int(len(data) * fraction)])
    _raises(cut, r"truncated DICOM file \(")


def test_truncated_png_and_npy(tmp_path):
    png = write_image(tmp_path / "p.png", _pixels(bits=16))
    png.write_bytes(png.read_bytes()[:200])
    _raises(png, "cannot decode PNG", pixel_spacing_mm=0.1)
    npy = write_image(tmp_path / "a.npy", _pixels().astype(float))
    npy.write_bytes(npy.read_bytes()[:300])
    _raises(npy, "cannot read NumPy file", pixel_spacing_mm=0.1)


def test_dicom_without_pixel_data(tmp_path):
    meta = FileMetaDataset()
    meta.MediaStorageSOPClassUID = UID("1.2.840.10008.5.1.4.1.1.88.11")  # Basic Text SR Storage (PS3.4)
    meta.MediaStorageSOPInstanceUID = generate_uid()
    meta.TransferSyntaxUID = ExplicitVRLittleEndian
    ds = FileDataset(str(tmp_path / "sr.dcm"), {}, file_meta=meta, preamble=b"\0" * 128)
    ds.SOPClassUID = meta.MediaStorageSOPClassUID
    ds.SOPInstanceUID = meta.MediaStorageSOPInstanceUID
    ds.Modality = "SR"
    path = tmp_path / "sr.dcm"
    ds.save_as(path, enforce_file_format=True)
    msg = _raises(path, "no pixel data")
    assert "Basic Text SR Storage" in msg


def test_rgb_png(tmp_path):
    import cv2

    p = tmp_path / "colour.png"
    cv2.imwrite(str(p), np.zeros((40, 50, 3), dtype=np.uint8))
    msg = _raises(p, "colour image with 3 channels", pixel_spacing_mm=0.1)
    assert "40×50×3" in msg


def test_rgb_dicom(tmp_path):
    # Samples per Pixel (0028,0002) = 3, Photometric Interpretation (0028,0004) RGB.
    src = _mg(tmp_path)
    rgb = np.zeros((48, 64, 3), dtype=np.uint8)
    p = _edit_dicom(
        src,
        tmp_path / "rgb.dcm",
        SamplesPerPixel=3,
        PhotometricInterpretation="RGB",
        PlanarConfiguration=0,
        BitsAllocated=8,
        BitsStored=8,
        HighBit=7,
        PixelData=rgb.tobytes(),
    )
    msg = _raises(p, "3 samples per pixel")
    assert "48×64×3" in msg


def test_multi_frame_dicom(tmp_path):
    # Number of Frames (0028,0008) = 3.
    src = _mg(tmp_path)
    frames = np.zeros((3, 48, 64), dtype=np.uint16)
    p = _edit_dicom(src, tmp_path / "mf.dcm", NumberOfFrames=3, PixelData=frames.tobytes())
    msg = _raises(p, "multi-frame")
    assert "3×48×64" in msg


def test_3d_npy_and_multipage_tiff(tmp_path):
    import tifffile

    np.save(tmp_path / "stack.npy", np.zeros((3, 40, 50)))
    msg = _raises(tmp_path / "stack.npy", "3-D data", pixel_spacing_mm=0.1)
    assert "3×40×50" in msg
    tifffile.imwrite(tmp_path / "pages.tif", np.zeros((2, 40, 50), dtype=np.uint16))
    msg = _raises(tmp_path / "pages.tif", "multi-page TIFF", pixel_spacing_mm=0.1)
    assert "2 pages" in msg and "40×50" in msg
    np.save(tmp_path / "line.npy", np.zeros(10))
    _raises(tmp_path / "line.npy", r"1-D data \(shape 10\)", pixel_spacing_mm=0.1)


@pytest.mark.parametrize("value, match", [(np.nan, "1 NaN, 0 infinite"), (np.inf, "0 NaN, 1 infinite")])
def test_non_finite_pixels(tmp_path, value, match):
    px = np.ones((32, 32))
    px[5, 7] = value
    p = write_image(tmp_path / "bad.npy", px)
    _raises(p, match, pixel_spacing_mm=0.1)


def test_non_numeric_npy(tmp_path):
    np.save(tmp_path / "obj.npy", np.array([[object(), 1]], dtype=object), allow_pickle=True)
    _raises(tmp_path / "obj.npy", "Python objects", pixel_spacing_mm=0.1)
    np.save(tmp_path / "cplx.npy", np.ones((8, 8), dtype=complex))
    _raises(tmp_path / "cplx.npy", "not real numbers", pixel_spacing_mm=0.1)


def test_too_small(tmp_path):
    p = _mg(tmp_path)  # 48 × 64
    msg = _raises(p, "smaller than", min_shape=(256, 256))
    assert "48×64" in msg and "256×256" in msg
    assert load_image(p, min_shape=(48, 64)).shape == (48, 64)


@pytest.mark.parametrize("name", ["a.tiff", "a.png", "a.npy"])
def test_missing_spacing_for_non_dicom(tmp_path, name):
    p = write_image(tmp_path / name, _pixels())
    _raises(p, "no pixel spacing")


def test_dicom_without_any_spacing(tmp_path):
    p = write_dicom(tmp_path / "nosp.dcm", _pixels(), (0.1, 0.1), tags={"ImagerPixelSpacing": None})
    _raises(p, r"neither Imager Pixel Spacing \(0018,1164\) nor Pixel Spacing \(0028,0030\)")
    assert load_image(p, pixel_spacing_mm=0.1).spacing_mm == (0.1, 0.1)


@pytest.mark.parametrize("spacing", [0.0, -0.1, np.nan, np.inf, (0.1, 0.0), (0.1, 0.1, 0.1), "wide"])
def test_bad_spacing_argument(tmp_path, spacing):
    p = write_image(tmp_path / "a.npy", _pixels())
    _raises(p, "given pixel spacing must be", pixel_spacing_mm=spacing)


def test_non_positive_spacing_in_dicom(tmp_path):
    p = write_dicom(tmp_path / "z.dcm", _pixels(), (0.1, 0.1), tags={"ImagerPixelSpacing": [0.0, 0.1]})
    _raises(p, r"Imager Pixel Spacing \(0018,1164\) must be positive")


def test_zero_rescale_slope(tmp_path):
    p = write_dicom(tmp_path / "s.dcm", _pixels(), (0.1, 0.1), tags={"RescaleSlope": 0})
    _raises(p, r"Rescale Slope \(0028,1053\)")


def test_compressed_syntax_without_installed_decoder(tmp_path, monkeypatch):
    # Simulate an installation without any JPEG-LS decoding plugin (pylibjpeg-libjpeg missing).
    from pydicom.pixels.decoders import JPEGLSLosslessDecoder

    p = _mg(tmp_path, syntax="jpeg-ls-lossless")
    assert np.array_equal(load_image(p).pixels, _pixels())  # decodes while the plugins are there
    monkeypatch.setattr(JPEGLSLosslessDecoder, "_available", {})
    msg = _raises(p, "no decoder for it is installed")
    assert "JPEG-LS Lossless Image Compression" in msg and "1.2.840.10008.1.2.4.80" in msg


def test_transfer_syntax_pydicom_cannot_decode(tmp_path):
    # JPEG 2000 Part 2 Multi-component (Lossless Only), PS3.5 Annex A: 1.2.840.10008.1.2.4.92.
    from pydicom.encaps import encapsulate

    src = _mg(tmp_path)
    ds = pydicom.dcmread(src)
    ds.file_meta.TransferSyntaxUID = UID("1.2.840.10008.1.2.4.92")
    ds.PixelData = encapsulate([b"\xff\x4f\xff\x51" + b"\0" * 60])
    ds["PixelData"].VR = "OB"
    p = tmp_path / "j2kp2.dcm"
    ds.save_as(p, enforce_file_format=True)
    msg = _raises(p, "no decoder")
    assert "1.2.840.10008.1.2.4.92" in msg


# ----------------------------------------------------------------------------- writer errors


def test_write_dicom_rejects_values_beyond_bits_stored(tmp_path):
    px = np.full((8, 8), 20000, dtype=np.uint16)  # > 2**14 − 1
    with pytest.raises(LimenError, match="do not fit in BitsStored = 14"):
        write_dicom(tmp_path / "x.dcm", px, (0.1, 0.1))
    write_dicom(tmp_path / "x.dcm", px, (0.1, 0.1), tags={"BitsStored": 16})
    ds = pydicom.dcmread(tmp_path / "x.dcm")
    assert (ds.BitsStored, ds.HighBit) == (16, 15)


@pytest.mark.parametrize(
    "kwargs, match",
    [
        ({"pixels": np.zeros((2, 8, 8), dtype=np.uint16)}, "2-D"),
        ({"pixels": np.zeros((8, 8), dtype=np.float32)}, "unsigned 16-bit"),
        ({"pixels": -np.ones((8, 8), dtype=np.int32)}, "do not fit in 16 bits"),
        ({"tags": {"NotAKeyword": 1}}, "unknown DICOM keyword"),
        ({"tags": {"Rows": 3}}, "set from the pixel array"),
        ({"transfer_syntax": "jpeg-baseline"}, "unknown transfer syntax"),
        ({"spacing_mm": (0.0, 0.1)}, "must be positive"),
    ],
)
def test_write_dicom_bad_arguments(tmp_path, kwargs, match):
    args = {"pixels": np.zeros((8, 8), dtype=np.uint16), "spacing_mm": (0.1, 0.1)} | kwargs
    with pytest.raises(LimenError, match=match) as ei:
        write_dicom(tmp_path / "w.dcm", **args)
    _assert_one_line_naming(ei, tmp_path / "w.dcm")


def test_write_dicom_without_encoder(tmp_path, monkeypatch):
    from pydicom.pixels.encoders import JPEGLSLosslessEncoder

    monkeypatch.setattr(JPEGLSLosslessEncoder, "_available", {})
    with pytest.raises(LimenError, match="no encoder installed"):
        write_dicom(tmp_path / "w.dcm", _pixels(), (0.1, 0.1), transfer_syntax="jpeg-ls-lossless")
    assert not (tmp_path / "w.dcm").exists()


def test_write_image_bad_extension_and_dicom_needs_spacing(tmp_path):
    with pytest.raises(LimenError, match="cannot write extension '.bmp'"):
        write_image(tmp_path / "a.bmp", _pixels())
    with pytest.raises(LimenError, match="needs the pixel spacing"):
        write_image(tmp_path / "a.dcm", _pixels())
    p = write_image(tmp_path / "b.dcm", _pixels(), spacing_mm=0.1, tags={"Modality": "MG"})
    assert np.array_equal(load_image(p).pixels, _pixels())


def test_decoder_failure_at_decode_time_names_the_syntax(tmp_path, monkeypatch):
    # pydicom's own error when no plugin can decode (raised inside pixel_array) must also
    # become a one-line LimenError naming the transfer syntax, not a traceback.
    from pydicom.pixels.decoders import JPEG2000LosslessDecoder

    import scorer.images.dicom_reader as dicom_reader

    p = _mg(tmp_path, syntax="jpeg2000-lossless")
    monkeypatch.setattr(dicom_reader, "_check_decoder", lambda ds, path: None)
    monkeypatch.setattr(JPEG2000LosslessDecoder, "_available", {})
    msg = _raises(p, "cannot decode pixel data in transfer syntax")
    assert "JPEG 2000 Image Compression (Lossless Only)" in msg and "1.2.840.10008.1.2.4.90" in msg


# ----------------------------------------------------------------------------- pixel intensity relationship
# DICOM PS3.3 C.8.11.3 (DX Image module): Pixel Intensity Relationship (0028,1040) is LIN (approximately
# proportional to X-ray beam intensity), LOG or OTHER; Pixel Intensity Relationship Sign (0028,1041) is +1 (lower
# stored values mean less beam intensity) or -1 (higher stored values mean less intensity).  PS3.3 C.7.6.3.1.2:
# Photometric Interpretation MONOCHROME1 / MONOCHROME2 only says whether the lowest value is displayed white or
# black.  Scoring needs values rising in proportion to air kerma (contrast = fractional drop, DEVELOPERS.md).


def _mg_tags(tmp_path, name="ok.dcm", tags=None) -> Path:
    return write_dicom(tmp_path / name, _pixels(), (0.1, 0.1), tags={"Modality": "MG", **(tags or {})})


def _two_level_kerma(shape=(48, 64), background_ugy=100.0, contrast=0.02):
    """Air kerma: a background and a square whose kerma is lower by the fractional ``contrast``."""
    k = np.full(shape, background_ugy)
    k[16:32, 24:40] *= 1.0 - contrast
    return k


def _contrast(pixels) -> float:
    return 1.0 - float(pixels[16:32, 24:40].mean()) / float(pixels[:8, :].mean())


def test_default_dicom_records_lin_rising(tmp_path):
    # write_dicom writes LIN / +1 / MONOCHROME2 (PS3.3 C.8.11.3, C.7.6.3.1.2); load_image keeps them
    md = load_image(_mg(tmp_path)).metadata
    assert (md.photometric_interpretation, md.intensity_relationship, md.intensity_sign) == ("MONOCHROME2", "LIN", 1)
    assert md.intensity_direction == "rising"


@pytest.mark.parametrize("photometric", ["MONOCHROME1", "MONOCHROME2"])
def test_sign_minus_one_is_refused_without_conversion(tmp_path, photometric):
    # PS3.3 C.8.11.3: sign -1 = higher stored values correspond to less X-ray beam intensity
    p = _mg_tags(tmp_path, tags={"PixelIntensityRelationshipSign": -1, "PhotometricInterpretation": photometric})
    msg = _raises(p, r"Pixel Intensity Relationship Sign \(0028,1041\) is -1")
    assert "fall" in msg and "--conversion" in msg


def test_falling_image_with_its_conversion_gives_kerma_and_contrast(tmp_path):
    # A falling linear response PV = 16000 − 20·K (PS3.3 C.8.11.3 LIN, sign -1) is exactly what a conversion
    # function with negative gain describes (K = (PV − offset)/gain); linearised, the square's contrast is the
    # fractional kerma drop it was built with.  The rising twin (PV = 60 + 20·K, sign +1) gives the same kerma.
    kerma = _two_level_kerma()
    rising_conv = ConversionFunction("linear", offset=60.0, gain=20.0)
    falling_conv = ConversionFunction("linear", offset=16000.0, gain=-20.0)
    rising = write_dicom(
        tmp_path / "up.dcm", np.rint(rising_conv.to_pixel_value(kerma)).astype(np.uint16), (0.1, 0.1), tags=TAGS
    )
    falling = write_dicom(
        tmp_path / "down.dcm",
        np.rint(falling_conv.to_pixel_value(kerma)).astype(np.uint16),
        (0.1, 0.1),
        tags={**TAGS, "PixelIntensityRelationshipSign": -1, "PhotometricInterpretation": "MONOCHROME1"},
    )
    up = load_image(rising, conversion=rising_conv)
    down = load_image(falling, conversion=falling_conv)
    assert down.metadata.intensity_direction == "falling" and down.metadata.intensity_sign == -1
    # integer stored values: the kerma is off by at most half a step, 0.5 / |gain| µGy
    np.testing.assert_allclose(down.pixels, kerma, rtol=0, atol=0.5 / 20.0 + 1e-12)
    np.testing.assert_allclose(down.pixels, up.pixels, rtol=0, atol=1e-12)
    assert _contrast(down.pixels) == pytest.approx(0.02, abs=1e-4)
    # the stored values themselves rise where the kerma drops: read as if rising, the "contrast" is negative
    raw = load_image(falling, for_conversion_fit=True).pixels
    assert _contrast(raw) < 0


def test_conversion_running_against_the_sign_is_refused(tmp_path):
    # PS3.3 C.8.11.3: sign -1 falls with intensity; a conversion with gain > 0 makes kerma rise with the value
    p = _mg_tags(tmp_path, tags={"PixelIntensityRelationshipSign": -1})
    msg = _raises(p, "conversion function", conversion=ConversionFunction("linear", 60.0, 20.0))
    assert "(0028,1041) is -1" in msg and "rise" in msg
    # and a falling conversion on a +1 (rising) file
    q = _mg(tmp_path, name="up.dcm")
    msg = _raises(q, "conversion function", conversion=ConversionFunction("logarithmic", 9000.0, -500.0))
    assert "(0028,1041) is +1" in msg


@pytest.mark.parametrize(
    "slope, sign, accepted",
    [(-1.0, 1, False), (-1.0, -1, True), (2.0, -1, False)],
)
def test_rescale_slope_sign_enters_the_direction(tmp_path, slope, sign, accepted):
    # PS3.3 C.11.1.1.2: output = Rescale Slope × stored value + Rescale Intercept, so a negative slope turns
    # values rising with intensity (sign +1, which describes the stored values) into falling ones and back
    tags = {"RescaleSlope": slope, "RescaleIntercept": 20000.0, "PixelIntensityRelationshipSign": sign}
    p = _mg_tags(tmp_path, tags=tags)
    if accepted:
        img = load_image(p)
        assert img.metadata.intensity_direction == "rising"
        np.testing.assert_array_equal(img.pixels, slope * _pixels().astype(np.float64) + 20000.0)
    else:
        msg = _raises(p, r"\(0028,1041\)")
        assert "fall" in msg
        if slope < 0:
            assert "Rescale Slope (0028,1053) is -1" in msg


def test_monochrome1_with_sign_plus_one_is_not_inverted(tmp_path):
    # PS3.3 C.7.6.3.1.2: MONOCHROME1 is a display instruction; with sign +1 the values rise with intensity and are
    # read as stored
    p = _mg_tags(tmp_path, tags={"PhotometricInterpretation": "MONOCHROME1", "PixelIntensityRelationshipSign": 1})
    img = load_image(p)
    np.testing.assert_array_equal(img.pixels, _pixels().astype(np.float64))
    assert img.metadata.photometric_interpretation == "MONOCHROME1" and img.metadata.intensity_direction == "rising"


def test_monochrome1_without_sign_needs_a_conversion(tmp_path):
    # PS3.3 C.7.6.3.1.2 / C.8.11.3: without (0028,1041) a MONOCHROME1 file does not say how its values relate to
    # the beam, so it is refused unless a conversion function measured on the detector says it
    p = _mg_tags(tmp_path, tags={"PhotometricInterpretation": "MONOCHROME1", "PixelIntensityRelationshipSign": None})
    msg = _raises(p, "MONOCHROME1")
    assert "unknown" in msg and "--conversion" in msg
    conv = ConversionFunction("linear", offset=16383.0, gain=-20.0)
    img = load_image(p, conversion=conv)
    assert img.metadata.intensity_direction is None and img.metadata.intensity_sign is None
    np.testing.assert_allclose(img.pixels, (_pixels().astype(np.float64) - 16383.0) / -20.0, rtol=1e-15)
    # MONOCHROME2 without the sign is read as before: stored values taken as rising
    q = _mg_tags(tmp_path, name="m2.dcm", tags={"PixelIntensityRelationshipSign": None})
    assert load_image(q).metadata.intensity_direction == "rising"


@pytest.mark.parametrize("value", [0, 2])
def test_sign_outside_plus_minus_one_is_refused(tmp_path, value):
    # PS3.3 C.8.11.3: the enumerated values of (0028,1041) are +1 and -1
    p = _mg_tags(tmp_path, tags={"PixelIntensityRelationshipSign": value})
    msg = _raises(p, r"\(0028,1041\)")
    assert "neither +1 nor -1" in msg


@pytest.mark.parametrize("relationship", ["LOG", "OTHER"])
def test_log_or_other_relationship_is_refused_without_conversion(tmp_path, relationship):
    # PS3.3 C.8.11.3: LOG is a non-linear (logarithmic) relation to beam intensity, OTHER an unstated one; a
    # fractional drop of such values is not the fractional drop of kerma
    p = _mg_tags(tmp_path, tags={"PixelIntensityRelationship": relationship})
    msg = _raises(p, rf"Pixel Intensity Relationship \(0028,1040\) is {relationship}")
    assert "--conversion" in msg


def test_log_relationship_with_conversion_kinds(tmp_path):
    # PS3.3 C.8.11.3 LOG with a logarithmic conversion PV = offset + gain·ln K: read without a warning, and the
    # contrast of the square is the fractional kerma drop (analytic inverse K = exp((PV − offset)/gain))
    kerma = _two_level_kerma(contrast=0.05)
    conv = ConversionFunction("logarithmic", offset=1000.0, gain=2000.0)
    pv = np.rint(conv.to_pixel_value(kerma)).astype(np.uint16)
    p = write_dicom(tmp_path / "log.dcm", pv, (0.1, 0.1), tags={**TAGS, "PixelIntensityRelationship": "LOG"})
    with warnings.catch_warnings():
        warnings.simplefilter("error", LimenWarning)
        img = load_image(p, conversion=conv)
    assert img.metadata.intensity_relationship == "LOG"
    assert _contrast(img.pixels) == pytest.approx(0.05, abs=1e-3)
    # a linear conversion on LOG data (or a logarithmic one on LIN data) is warned, and the warning kept
    with pytest.warns(LimenWarning, match=r"\(0028,1040\) is LOG but the conversion function is linear"):
        img = load_image(p, conversion=ConversionFunction("linear", 0.0, 100.0))
    assert any("is LOG" in w for w in img.metadata.warnings)
    with pytest.warns(LimenWarning, match=r"is LIN but the conversion function is logarithmic"):
        load_image(_mg(tmp_path, name="lin.dcm"), conversion=conv)
