"""The layering of ``scorer/`` stays true: a lower package never imports a higher one.

images < phantom < observer < detector, study < qc < reports < commands < cli < demo (DEVELOPERS.md).
``detector`` and ``study`` sit side by side and never import each other.  The base modules
(``scorer``, ``scorer.errors``, ``scorer.files``) import no package at all.  Every import counts,
including those inside functions (they are how heavy modules load late, but still a dependency).
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
    "images": 1,
    "phantom": 2,
    "observer": 3,
    "detector": 4,
    "study": 4,
    "qc": 5,
    "reports": 6,
    "commands": 7,
    "cli": 8,
    "demo": 9,
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
    (fake / "detector" / "also_bad.py").write_text("from scorer.study.stats import analyse_study\n")
    monkeypatch.setattr(__import__(__name__), "SCORER", fake)
    found = _violations()
    assert any("images/bad.py:2" in v for v in found)
    assert any("detector/also_bad.py:1" in v for v in found)


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


@pytest.mark.parametrize("package", ["images", "phantom", "observer", "detector", "study", "qc", "reports"])
def test_every_public_name_is_importable(package):
    import importlib

    mod = importlib.import_module(f"scorer.{package}")
    assert mod.__all__, package
    for name in mod.__all__:
        assert getattr(mod, name) is not None, f"scorer.{package}.{name}"
