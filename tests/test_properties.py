"""Property-based tests (hypothesis): any input to a parser gives a valid result or the project's one-line
LimenError, never another exception.

Parsers covered: the layout format (``parse_layout``), the limits file (``parse_limits``), the nightly
configuration (``load_config``), the image reader (``load_image``, on mutated DICOM, PNG, TIFF and NumPy files)
and the reader-study trial table (``load_trials`` / ``validate_trials``). Inputs are valid documents with random
mutations (a value replaced by a random one, a key dropped, bytes flipped or cut), plus free random text.
"""

from __future__ import annotations

import copy
import tempfile
import tomllib
from pathlib import Path
from unittest import mock

import numpy as np
import pandas as pd
from helpers import MINI
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from scorer.errors import LimenError

SETTINGS = settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow], derandomize=True)

# values a hand-edited TOML file or a spreadsheet could hold where a number, text or list was expected
scalars = st.one_of(
    st.none(),
    st.booleans(),
    st.integers(-(10**12), 10**12),
    st.floats(allow_nan=True, allow_infinity=True),
    st.text(max_size=12),
)
values = st.recursive(
    scalars,
    lambda inner: st.one_of(st.lists(inner, max_size=4), st.dictionaries(st.text(max_size=8), inner, max_size=3)),
    max_leaves=8,
)


def _paths(obj, prefix=()):
    """Every path (tuple of keys/indices) into a nested dict/list document."""
    out = [prefix] if prefix else []
    if isinstance(obj, dict):
        for k, v in obj.items():
            out += _paths(v, prefix + (k,))
    elif isinstance(obj, list):
        for i, v in enumerate(obj):
            out += _paths(v, prefix + (i,))
    return out


@st.composite
def mutated(draw, doc: dict, n_max: int = 3):
    """``doc`` with 1…n_max random edits: a value replaced, a key or list item removed."""
    doc = copy.deepcopy(doc)
    for _ in range(draw(st.integers(1, n_max))):
        paths = _paths(doc)
        if not paths:
            break
        path = draw(st.sampled_from(paths))
        parent = doc
        for k in path[:-1]:
            parent = parent[k]
        if draw(st.booleans()):
            parent[path[-1]] = draw(values)
        elif isinstance(parent, dict):
            del parent[path[-1]]
        else:
            parent.pop(path[-1])
    return doc


def _one_line(exc: LimenError) -> None:
    assert "\n" not in str(exc) and str(exc).strip()


# ---------------------------------------------------------------- layout
LAYOUT_DOC = tomllib.loads(MINI.read_text(encoding="utf-8"))


@SETTINGS
@given(mutated(LAYOUT_DOC))
def test_layout_parser_gives_a_layout_or_a_limen_error(doc):
    from scorer.phantom import parse_layout

    try:
        lay = parse_layout(doc, "mutated.toml")
    except LimenError as exc:
        _one_line(exc)
        assert "mutated.toml" in str(exc)
        return
    assert lay.targets and all(0 < t.contrast < 1 and t.diameter_mm > 0 for t in lay.targets)


@SETTINGS
@given(st.text(max_size=300))
def test_layout_file_of_random_text(text):
    from scorer.phantom import load_layout

    with tempfile.TemporaryDirectory() as d:
        p = Path(d) / "random.toml"
        p.write_text(text, encoding="utf-8")
        try:
            load_layout(p)
        except LimenError as exc:
            _one_line(exc)


# ---------------------------------------------------------------- limits
LIMITS_DOC = {
    "format": "limen-limits/1",
    "name": "test",
    "observer": "npw",
    "source": "invented for a test",
    "limits": [{"diameter_mm": 0.1, "acceptable": 0.2, "achievable": 0.15}, {"diameter_mm": 1.0, "acceptable": 0.014}],
}


@SETTINGS
@given(mutated(LIMITS_DOC))
def test_limits_parser_gives_limits_or_a_limen_error(doc):
    from scorer.observer import parse_limits

    try:
        lim = parse_limits(doc, "mutated-limits.toml")
    except LimenError as exc:
        _one_line(exc)
        return
    assert all(np.isfinite(a) and a > 0 for a in lim.acceptable)


# ---------------------------------------------------------------- nightly configuration
CONFIG_DOC = {
    "format": "limen-nightly/1",
    "programme": "test programme",
    "defaults": {"accept_unlisted": False},
    "alerts": {},
    "detectors": [{"name": "room 1", "detector_id": "HSX-SE-0417"}],
}


@SETTINGS
@given(mutated(CONFIG_DOC))
def test_nightly_config_parser_gives_a_config_or_a_limen_error(doc):
    from scorer.qc import load_config

    with tempfile.TemporaryDirectory() as d:
        p = Path(d) / "nightly.toml"
        p.write_text("", encoding="utf-8")
        with mock.patch("scorer.qc.config.read_toml", return_value=doc):
            try:
                load_config(p)
            except LimenError as exc:
                _one_line(exc)


# ---------------------------------------------------------------- image reader
def _valid_files() -> dict[str, bytes]:
    from scorer.images import write_image

    rng = np.random.default_rng(0)
    arr = rng.integers(1000, 3000, size=(48, 40)).astype(np.uint16)
    out = {}
    with tempfile.TemporaryDirectory() as d:
        for ext in (".dcm", ".png", ".tif", ".npy"):
            p = Path(d) / f"x{ext}"
            write_image(p, arr, spacing_mm=(0.1, 0.1))
            out[ext] = p.read_bytes()
    return out


VALID_IMAGES = _valid_files()


@st.composite
def damaged_image(draw):
    ext = draw(st.sampled_from(sorted(VALID_IMAGES)))
    data = bytearray(VALID_IMAGES[ext])
    for _ in range(draw(st.integers(0, 6))):
        i = draw(st.integers(0, len(data) - 1))
        data[i] = draw(st.integers(0, 255))
    if ext == ".png" and draw(st.booleans()):
        # a header declaring another size (CRC recomputed, so only the size is wrong): PNG spec, IHDR chunk
        import struct
        import zlib

        w, h = draw(st.integers(1, 2**31 - 1)), draw(st.integers(1, 2**31 - 1))
        data[16:24] = struct.pack(">II", w, h)
        data[29:33] = struct.pack(">I", zlib.crc32(bytes(data[12:29])) & 0xFFFFFFFF)
    if draw(st.booleans()):
        data = data[: draw(st.integers(0, len(data)))]
    return ext, bytes(data)


@SETTINGS
@given(damaged_image())
def test_image_reader_gives_an_image_or_a_limen_error(case):
    from scorer.images import load_image

    ext, data = case
    with tempfile.TemporaryDirectory() as d:
        p = Path(d) / f"damaged{ext}"
        p.write_bytes(data)
        try:
            im = load_image(p, pixel_spacing_mm=None if ext == ".dcm" else 0.1)
        except LimenError as exc:
            _one_line(exc)
            assert "damaged" in str(exc)
            return
    assert im.pixels.ndim == 2 and np.isfinite(im.pixels).all()
    assert all(s > 0 for s in im.spacing_mm)


# ---------------------------------------------------------------- trial tables
def _trials() -> pd.DataFrame:
    from scorer.study import simulate_reader_study

    st_ = simulate_reader_study(np.random.default_rng(5), 2, diameters_mm=(0.5,), n_images=3)
    return st_.trials.head(24).reset_index(drop=True)


TRIALS = _trials()


@st.composite
def damaged_table(draw):
    df = TRIALS.copy().astype(object)
    for _ in range(draw(st.integers(1, 4))):
        what = draw(st.sampled_from(["cell", "drop", "dup", "cut", "percent"]))
        if what == "cell" and len(df):
            df.iat[draw(st.integers(0, len(df) - 1)), draw(st.integers(0, df.shape[1] - 1))] = draw(scalars)
        elif what == "drop" and df.shape[1] > 1:
            df = df.drop(columns=[draw(st.sampled_from(list(df.columns)))])
        elif what == "dup" and len(df):
            df = pd.concat([df, df.iloc[[draw(st.integers(0, len(df) - 1))]]], ignore_index=True)
        elif what == "cut":
            df = df.head(draw(st.integers(0, len(df))))
        elif what == "percent" and "contrast" in df.columns:  # contrasts typed in per cent
            # kept as object, like every column, so a later "cell" damage may put any value there
            df["contrast"] = (pd.to_numeric(df["contrast"], errors="coerce") * 100).astype(object)
    return df


@SETTINGS
@given(damaged_table())
def test_trial_validator_gives_a_table_or_a_limen_error(df):
    from scorer.study.trials import validate_trials

    try:
        out = validate_trials(df, source="mutated.csv")
    except LimenError as exc:
        _one_line(exc)
        assert "mutated.csv" in str(exc)
        return
    assert ((out["contrast"] > 0) & (out["contrast"] < 1)).all() and set(out["correct"]) <= {0, 1}
    key = ["reader", "detector", "image", "target"] + [c for c in ("session", "repeat") if c in out.columns]
    assert not out.duplicated(subset=key).any()


@SETTINGS
@given(st.binary(max_size=400) | st.text(max_size=400).map(lambda t: t.encode("utf-8")))
def test_trial_file_of_random_bytes(data):
    from scorer.workflow import load_trials

    with tempfile.TemporaryDirectory() as d:
        p = Path(d) / "random.csv"
        p.write_bytes(data)
        try:
            load_trials(p)
        except LimenError as exc:
            _one_line(exc)


@SETTINGS
@given(st.binary(max_size=200))
def test_trial_csv_with_a_valid_header_and_random_body(body):
    from scorer.workflow import load_trials

    head = TRIALS.head(3).to_csv(index=False).encode()
    with tempfile.TemporaryDirectory() as d:
        p = Path(d) / "body.csv"
        p.write_bytes(head + body)
        try:
            load_trials(p)
        except LimenError as exc:
            _one_line(exc)
