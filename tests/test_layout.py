"""Phantom layout files: the bundled plates load, and each malformed case is rejected by name."""

import re
import tomllib
from pathlib import Path

import numpy as np
import pytest

from scorer.errors import LimenError
from scorer.phantom import default_layout_path, load_layout, parse_layout

MINI = Path(__file__).parent / "data" / "mini-plate.toml"


def test_demo_plate_loads_with_the_designed_content():
    lay = load_layout()
    assert lay.name == "Cairn demo plate"
    assert len(lay.targets) == 90
    # the five diameters with threshold-contrast limits in the European guidelines for digital mammography
    # (4th ed., 2006; from memory) must be on the plate itself, so a verdict never rests on interpolation
    for d in (0.1, 0.25, 0.5, 1.0, 2.0):
        assert d in lay.diameters_mm
    assert len(lay.diameters_mm) == 9
    assert len(lay.fiducials) >= 3
    for d in lay.diameters_mm:
        ts = lay.targets_with_diameter(d)
        assert len(ts) == 10
        assert {t.m_alternatives for t in ts} == ({3} if d <= 0.35 else {5})
        assert all(t.material is None for t in ts)  # a generic attenuating-disc plate
        cs = sorted(t.contrast for t in ts)
        assert cs[-1] / cs[0] > 30  # 0.3x the lower to 10x the higher panel threshold
    # signal sites are spread over every position of a cell, not always the same one
    assert len({t.signal_site for t in lay.targets if t.m_alternatives == 3}) == 3
    assert len({t.signal_site for t in lay.targets if t.m_alternatives == 5}) == 5


def test_demo_plate_sites_are_regular_polygons():
    # triangles of side 3 mm and pentagons of side 4 or 8 mm: every side of a cell has the same length
    lay = load_layout()
    for t in lay.targets:
        xy = t.sites
        sides = np.hypot(*(xy - np.roll(xy, 1, axis=0)).T)
        assert np.ptp(sides) < 0.01, t.id
        assert sides[0] == pytest.approx(
            3.0 if t.m_alternatives == 3 else (8.0 if t.diameter_mm == 2.0 else 4.0), abs=0.01
        )


def test_demo_plate_is_generated_by_its_script():
    import importlib.util

    spec = importlib.util.spec_from_file_location("gen", default_layout_path().with_name("make_cairn_demo.py"))
    gen = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(gen)
    assert gen.build() == default_layout_path().read_text(encoding="utf-8")


def test_known_site_design():
    data = tomllib.loads(MINI.read_text())
    data["targets"] = [
        {
            "id": "k1",
            "diameter_mm": 1.0,
            "contrast": 0.01,
            "known_site_mm": [20.0, 20.0],
            "background_sites_mm": [[26.0, 20.0], [20.0, 26.0]],
        }
    ]
    lay = parse_layout(data, "k.toml")
    t = lay.targets[0]
    assert t.design == "known" and t.signal_site == 0 and t.m_alternatives == 3


def _broken(mutate):
    data = tomllib.loads(MINI.read_text())
    mutate(data)
    return data


CASES = [
    ("unknown key", lambda d: d["targets"][0].__setitem__("colour", "red"), r"target 'm00'.*unknown key 'colour'"),
    ("unknown top key", lambda d: d.__setitem__("extras", 1), r"top level.*unknown key 'extras'"),
    (
        "overlap",
        lambda d: d["targets"][1].__setitem__("sites_mm", [[5.6, 6.5], [9.5, 6.5], [3.5, 9.5], [9.5, 9.5]]),
        r"overlaps",
    ),
    (
        "outside",
        lambda d: d["targets"][0].__setitem__("sites_mm", [[-1.0, 6.5], [7.5, 6.5], [4.5, 9.5], [7.5, 9.5]]),
        r"target 'm00'.*outside",
    ),
    (
        "diameter",
        lambda d: d["targets"][2].__setitem__("diameter_mm", 0.0),
        r"target 'm02'.*diameter_mm must be positive",
    ),
    (
        "contrast high",
        lambda d: d["targets"][3].__setitem__("contrast", 1.2),
        r"target 'm03'.*contrast must lie in \(0, 1\)",
    ),
    ("contrast zero", lambda d: d["targets"][3].__setitem__("contrast", 0.0), r"contrast must lie in \(0, 1\)"),
    ("two fiducials", lambda d: d.__setitem__("fiducials", d["fiducials"][:2]), r"at least three fiducial"),
    (
        "truth index",
        lambda d: d["targets"][4].__setitem__("signal_site", 5),
        r"target 'm04'.*signal_site 5 is out of range 0..4",
    ),
    ("no key", lambda d: d.pop("orientation_key"), r"orientation_key"),
    ("format", lambda d: d.__setitem__("format", "other/2"), r"format"),
]


@pytest.mark.parametrize("name,mutate,pattern", CASES, ids=[c[0] for c in CASES])
def test_malformed_layout_is_rejected_naming_file_entry_and_problem(name, mutate, pattern):
    with pytest.raises(LimenError) as exc:
        parse_layout(_broken(mutate), "plates/broken.toml")
    msg = str(exc.value)
    assert msg.startswith("plates/broken.toml: ")
    assert "\n" not in msg
    assert re.search(pattern, msg), msg


def test_unreadable_and_invalid_toml(tmp_path):
    with pytest.raises(LimenError, match="cannot read layout file"):
        load_layout(tmp_path / "missing.toml")
    bad = tmp_path / "bad.toml"
    bad.write_text("format = \n")
    with pytest.raises(LimenError, match="bad.toml: not valid TOML"):
        load_layout(bad)


def test_sites_geometry_of_mini_plate():
    lay = load_layout(MINI)
    allsites = np.concatenate([t.sites for t in lay.targets])
    assert allsites[:, 0].min() > 0 and allsites[:, 0].max() < lay.width_mm
