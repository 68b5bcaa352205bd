"""The layering of ``scorer/`` stays true: a lower package never imports a higher one.

images < phantom < observer < detector, study < workflow < qc < reports < commands < cli < demo
(DEVELOPERS.md).  ``detector`` and ``study`` sit side by side and never import each other.  The base
modules (``scorer``, ``scorer.errors``, ``scorer.files``) import no package at all.  Every import counts,
including those inside functions (they are how heavy modules load late, but still a dependency).

``observer``, ``detector`` and ``study`` are data in, data out: no module of theirs reads a file
(DESIGN.md; ``scorer.workflow`` reads them).  The image-format and layout parsers are called, outside
``scorer.images`` and ``scorer.phantom`` themselves, only by ``scorer.workflow`` and ``scorer.commands``.
"""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

SCORER = Path(__file__).resolve().parents[1] / "scorer"

RANK = {
    "": 0,
    "errors": 0,
    "files": 0,
    "invocation": 0,
    "resources": 0,
    "faults": 0,
    "extras": 0,
    "databases": 0,
    "images": 1,
    "phantom": 2,
    "observer": 3,
    "detector": 4,
    "study": 4,
    "workflow": 5,
    "qc": 6,
    "reports": 7,
    "commands": 8,
    "cli": 9,
    "demo": 10,
}


def _module_name(path: Path) -> str:
    rel = path.relative_to(SCORER.parent).with_suffix("")
    parts = list(rel.parts)
    if parts[-1] == "__init__":
        parts = parts[:-1]
    return ".".join(parts)


def _unit(module: str) -> str:
    """'scorer.observer.npw' -> 'observer'; 'scorer.errors' -> 'errors'; 'scorer' -> ''."""
    parts = module.split(".")
    return parts[1] if len(parts) > 1 else ""


def _imports(path: Path) -> list[tuple[int, str]]:
    mod = _module_name(path)
    package = mod if path.name == "__init__.py" else mod.rpartition(".")[0]
    found = []
    tree = ast.parse(path.read_text(encoding="utf-8"))
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            found += [(node.lineno, a.name) for a in node.names]
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base = package.split(".")
                base = base[: len(base) - (node.level - 1)]
                target = ".".join(base + ([node.module] if node.module else []))
                names = [target] if node.module else [f"{target}.{a.name}" for a in node.names]
                found += [(node.lineno, n) for n in names]
            elif node.module:
                found.append((node.lineno, node.module))
                found += [(node.lineno, f"{node.module}.{a.name}") for a in node.names]
    return found


def _violations() -> list[str]:
    out = []
    for path in sorted(SCORER.rglob("*.py")):
        mod = _module_name(path)
        unit = _unit(mod)
        assert unit in RANK, f"{path}: package {unit!r} has no rank; add it to RANK and DEVELOPERS.md"
        for line, target in _imports(path):
            top = target.split(".")[0]
            if top == "webapp" and unit not in ("commands", "cli"):
                out.append(f"{path.relative_to(SCORER.parent)}:{line} imports {target} (only commands may)")
            if top != "scorer":
                continue
            other = _unit(target)
            if other not in RANK or other == unit:
                continue
            if other == "" and target != "scorer":
                continue  # `from scorer import __version__` resolves to the base package
            if RANK[other] > RANK[unit] or (RANK[other] == RANK[unit] and RANK[unit] > 0):
                out.append(f"{path.relative_to(SCORER.parent)}:{line} ({unit}) imports {target} ({other})")
    return out


def test_no_package_imports_a_higher_or_sibling_one():
    assert _violations() == []


def test_the_check_catches_an_upward_import(tmp_path, monkeypatch):
    # the check must be able to fail: a fake images module importing the observer is a violation
    fake = tmp_path / "scorer"
    (fake / "images").mkdir(parents=True)
    (fake / "images" / "bad.py").write_text("def f():\n    from scorer.observer import score_images\n")
    (fake / "detector").mkdir()
    (fake / "detector" / "also_bad.py").write_text("from scorer.study.analysis import analyse_study\n")
    (fake / "study").mkdir()
    (fake / "study" / "reads_files.py").write_text("from scorer.workflow import load_trials\n")
    monkeypatch.setattr(__import__(__name__), "SCORER", fake)
    found = _violations()
    assert any("images/bad.py:2" in v for v in found)
    assert any("detector/also_bad.py:1" in v for v in found)
    assert any("study/reads_files.py:1" in v for v in found)  # workflow sits above study


def _drawing_below_reports() -> list[str]:
    out = []
    for path in sorted(SCORER.rglob("*.py")):
        if RANK.get(_unit(_module_name(path)), 0) >= RANK["reports"]:
            continue
        out += [
            f"{path.relative_to(SCORER.parent)}:{line} imports {target}"
            for line, target in _imports(path)
            if target.split(".")[0] == "matplotlib"
        ]
    return out


def test_only_reports_and_above_draw():
    # the computing packages (registration, scoring, detector, study, qc) stay pure: figures live in scorer/reports
    assert _drawing_below_reports() == []


def test_the_drawing_check_catches_matplotlib_in_a_low_layer(tmp_path, monkeypatch):
    fake = tmp_path / "scorer"
    (fake / "phantom").mkdir(parents=True)
    (fake / "phantom" / "draws.py").write_text("def f():\n    from matplotlib.figure import Figure\n")
    (fake / "reports").mkdir()
    (fake / "reports" / "fine.py").write_text("import matplotlib\n")
    monkeypatch.setattr(__import__(__name__), "SCORER", fake)
    found = _drawing_below_reports()
    assert found and all(v.startswith("scorer/phantom/draws.py:2 imports matplotlib.figure") for v in found)


@pytest.mark.parametrize("package", ["images", "phantom", "observer", "detector", "study", "workflow", "qc", "reports"])
def test_every_public_name_is_importable(package):
    import importlib

    mod = importlib.import_module(f"scorer.{package}")
    assert mod.__all__, package
    for name in mod.__all__:
        assert getattr(mod, name) is not None, f"scorer.{package}.{name}"


# --------------------------------------------------------------------------- data in, data out
#: the packages that take data and return data: none of their modules may read a file
DATA_PACKAGES = ("observer", "detector", "study")
#: names whose import means reading a file: the image, layout, conversion and limits readers of scorer.images,
#: scorer.phantom, scorer.files and scorer.workflow (``load_*``/``read_*`` of any scorer module), DICOM/TIFF
#: readers, and the hash of a file's bytes
READER_NAMES = {"image_content_hash", "dcmread", "imread", "fill_dicom_metadata"}
#: modules whose import means reading files (image formats, TOML, packaged data)
READER_MODULES = (
    "pydicom",
    "tifffile",
    "imageio",
    "PIL",
    "tomllib",
    "pickle",
    "importlib.resources",
    "scorer.workflow",
    "scorer.images.loading",
    "scorer.images.dicom_reader",
    "scorer.images.raster_readers",
    "scorer.images.formats",
)
#: calls that read a file: ``open(…)``, ``….open(…)``, ``….read_text()``, ``….read_bytes()``, ``np.load``…,
#: ``pd.read_*``, ``json.load``, ``tomllib.load``, ``….dcmread``, ``….imread``
READER_ATTRS = {"open", "read_text", "read_bytes", "dcmread", "imread", "imread_collection", "fromfile"}
#: the readers of scorer.images, scorer.phantom and scorer.files, also when called through their module
#: (``io.load_image(p)``)
CALLED_READERS = {"load_image", "load_layout", "load_conversion", "read_toml", "read_json", "image_content_hash"}
MODULE_READERS = {
    ("np", "load"),
    ("numpy", "load"),
    ("np", "loadtxt"),
    ("numpy", "loadtxt"),
    ("np", "genfromtxt"),
    ("numpy", "genfromtxt"),
    ("np", "memmap"),
    ("json", "load"),
    ("tomllib", "load"),
}
#: modules that still read a file where another piece of work moves the reading out (path → why); the
#: test fails once such a module reads nothing any more, so the entry is removed with the move
KNOWN_READERS: dict[str, str] = {}


def _is_reader_import(target: str) -> bool:
    name = target.rpartition(".")[2]
    if name in READER_NAMES:
        return True
    if target.startswith("scorer.") and (name.startswith("load_") or name.startswith("read_")):
        return True
    return any(target == m or target.startswith(m + ".") for m in READER_MODULES)


def _reader_calls(tree: ast.AST) -> list[tuple[int, str]]:
    found = []
    for node in ast.walk(tree):
        if not isinstance(node, ast.Call):
            continue
        f = node.func
        if isinstance(f, ast.Name) and f.id in ("open", "dcmread", "imread", *CALLED_READERS):
            found.append((node.lineno, f"calls {f.id}()"))
        elif isinstance(f, ast.Attribute):
            owner = f.value.id if isinstance(f.value, ast.Name) else None
            if f.attr in READER_ATTRS or f.attr in CALLED_READERS or (owner, f.attr) in MODULE_READERS:
                found.append((node.lineno, f"calls {owner + '.' if owner else '….'}{f.attr}()"))
            elif owner in ("pd", "pandas") and f.attr.startswith("read_"):
                found.append((node.lineno, f"calls {owner}.{f.attr}()"))
    return found


def _file_readers() -> dict[str, list[str]]:
    """Per module of the data packages: each import of a file reader and each call that reads a file."""
    out: dict[str, list[str]] = {}
    for unit in DATA_PACKAGES:
        for path in sorted((SCORER / unit).rglob("*.py")):
            rel = path.relative_to(SCORER.parent).as_posix()
            tree = ast.parse(path.read_text(encoding="utf-8"))
            hits = [f"{rel}:{line} imports {t}" for line, t in _imports(path) if _is_reader_import(t)]
            hits += [f"{rel}:{line} {what}" for line, what in _reader_calls(tree)]
            if hits:
                out[rel] = hits
    return out


def test_observer_detector_and_study_read_no_file():
    found = _file_readers()
    unexpected = [h for rel, hits in found.items() if rel not in KNOWN_READERS for h in hits]
    assert unexpected == [], "read files through scorer.workflow instead:\n" + "\n".join(unexpected)
    stale = sorted(set(KNOWN_READERS) - set(found))
    assert stale == [], f"{stale} read no file any more: remove them from KNOWN_READERS"


def test_the_reader_check_catches_each_kind_of_read(tmp_path, monkeypatch):
    # the check must be able to fail: each way of reading a file, in a fake observer/detector/study
    fake = tmp_path / "scorer"
    for unit in DATA_PACKAGES:
        (fake / unit).mkdir(parents=True)
    (fake / "observer" / "a.py").write_text("from scorer.images.loading import load_image\n")
    (fake / "observer" / "b.py").write_text("def f(p):\n    from scorer.files import read_toml\n")
    (fake / "observer" / "c.py").write_text("def f(p):\n    return open(p).read()\n")
    (fake / "detector" / "d.py").write_text("import numpy as np\n\ndef f(p):\n    return np.load(p)\n")
    (fake / "detector" / "e.py").write_text("def f(p):\n    return p.read_text()\n")
    (fake / "detector" / "f.py").write_text("import pydicom\n")
    (fake / "study" / "g.py").write_text("import pandas as pd\n\ndef f(p):\n    return pd.read_csv(p)\n")
    (fake / "study" / "h.py").write_text("from scorer.workflow import score_files\n")
    (fake / "study" / "i.py").write_text("from scorer.images import io\n\ndef f(p):\n    return io.load_image(p)\n")
    (fake / "study" / "ok.py").write_text("import json\n\ndef f(text):\n    return json.loads(text)\n")
    monkeypatch.setattr(__import__(__name__), "SCORER", fake)
    found = _file_readers()
    for name in "abcdefghi":
        unit = "observer" if name in "abc" else "detector" if name in "def" else "study"
        assert f"scorer/{unit}/{name}.py" in found, name
    assert "scorer/study/ok.py" not in found
    assert any(":4 calls np.load()" in h for h in found["scorer/detector/d.py"])


# --------------------------------------------------------------------------- who calls the parsers
#: the parsers of image, conversion and layout files (and the file hash); outside the packages that define
#: them only scorer.workflow and scorer.commands import them (others go through scorer.workflow)
PARSERS = {"load_image", "image_content_hash", "load_conversion", "load_layout", "fill_dicom_metadata"}
PARSER_CALLERS = {"images", "phantom", "workflow", "commands"}
#: the DICOM network node decodes the datasets a modality sends (pydicom) and writes them to the inbox; it
#: is an edge of its own, like workflow, and reads no file of the core
NETWORK_EDGE = {"scorer/qc/receiver.py"}


def _parser_imports(roots) -> list[str]:
    out = []
    for root in roots:
        for path in sorted(root.rglob("*.py")):
            mod = _module_name(path) if root == SCORER else path.relative_to(root.parent).as_posix()
            unit = _unit(mod) if root == SCORER else root.name
            if unit in PARSER_CALLERS or path.relative_to(root.parent).as_posix() in NETWORK_EDGE:
                continue
            for line, target in _imports(path):
                module, _, name = target.rpartition(".")
                if name in PARSERS and not module.startswith("scorer.workflow"):
                    out.append(f"{path.relative_to(root.parent)}:{line} imports {target}")
                elif target.split(".")[0] in ("pydicom", "tifffile"):
                    out.append(f"{path.relative_to(root.parent)}:{line} imports {target}")
    return out


def test_only_workflow_and_commands_call_the_file_parsers():
    roots = [SCORER, SCORER.parent / "webapp"]
    assert _parser_imports(roots) == []


def test_the_parser_check_catches_a_direct_call(tmp_path, monkeypatch):
    fake = tmp_path / "scorer"
    (fake / "qc").mkdir(parents=True)
    (fake / "qc" / "bad.py").write_text("def f():\n    from scorer.images import load_image\n")
    (fake / "qc" / "good.py").write_text("from scorer.workflow import load_image\n")
    (fake / "commands").mkdir()
    (fake / "commands" / "fine.py").write_text("from scorer.phantom import load_layout\n")
    monkeypatch.setattr(__import__(__name__), "SCORER", fake)
    assert _parser_imports([fake]) == ["scorer/qc/bad.py:2 imports scorer.images.load_image"]
