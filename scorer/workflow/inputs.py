"""The files a score is configured with: layout, conversion function, images, limits, human/model factor,
measured MTF and kerma CSV — each read here and handed to the pure packages as data.

Errors name the file and the problem on one line (:class:`~scorer.errors.LimenError`).
"""

from __future__ import annotations

import csv
from pathlib import Path

from scorer.errors import LimenError, short_text
from scorer.files import PathArg, read_json, read_toml
from scorer.images.conversion import load_conversion
from scorer.images.image import LimenWarning
from scorer.images.loading import image_content_hash, load_image
from scorer.observer.defects import DefectMap
from scorer.observer.limits import HumanFactor, Limits, parse_human_factor, parse_limits
from scorer.observer.npw import SystemBlur
from scorer.phantom.layout import load_layout

__all__ = [
    "EXAMPLE_LIMITS",
    "LimenWarning",
    "human_factor_from_analysis",
    "image_content_hash",
    "load_conversion",
    "load_defect_map",
    "load_image",
    "load_layout",
    "load_limits",
    "load_mtf",
    "read_kerma_csv",
    "resolve_human_factor",
]

DATA_DIR = Path(__file__).resolve().parents[1] / "data"
#: the limits file shipped with Limen (limits of the European guidelines for digital mammography, 2006)
EXAMPLE_LIMITS = DATA_DIR / "limits-eu-guidelines-2006-digital-mammography.toml"


def load_limits(path: PathArg) -> Limits:
    """Read and validate a limits file ``limen-limits/1`` (errors name the file and the entry).

    Parameters
    ----------
    path : str or path-like
        The limits TOML file.

    Returns
    -------
    Limits
    """
    path = Path(path)
    return parse_limits(read_toml(path, "limits file"), path)


def human_factor_from_analysis(path: PathArg, observer: str) -> HumanFactor:
    """The human/model threshold factor that `limen analyse --model` measured for ``observer``, from its
    analysis.json.

    Parameters
    ----------
    path : str or path-like
        The analysis.json of ``limen analyse --model``.
    observer : {"npw", "npwe"}
        The model observer whose factor is wanted.

    Returns
    -------
    HumanFactor
    """
    return parse_human_factor(read_json(path, "analysis file (an analysis.json)"), observer, path)


def resolve_human_factor(
    value: float | None, analysis_file: PathArg | None, observer: str, method: str | None = None
) -> HumanFactor | float | None:
    """The human/model factor from ``--human-factor`` or ``--human-factor-from`` (an analysis.json), never both.

    With ``method`` (the threshold method the factor will be applied to), a factor the analysis measured only
    for another method is refused here, before any image is scored (:meth:`HumanFactor.for_method`).

    Parameters
    ----------
    value : float, optional
        ``--human-factor``.
    analysis_file : str or path-like, optional
        ``--human-factor-from``.
    observer : {"npw", "npwe"}
        The model observer the factor is for.
    method : {"dprime", "count"}, optional
        The threshold method the factor will be applied to.

    Returns
    -------
    HumanFactor, float or None
        The factor read from the analysis, the value given, or None when neither was given.
    """
    if analysis_file:
        if value is not None:
            raise LimenError("give either --human-factor or --human-factor-from, not both", "--human-factor")
        factor = human_factor_from_analysis(analysis_file, observer)
        return factor.for_method(method) if method else factor
    return value


def load_mtf(path: PathArg) -> SystemBlur:
    """The measured presampling MTF of a ``limen detector`` JSON, as the templates' system blur.

    Parameters
    ----------
    path : str or path-like
        A detector.json written by ``limen detector``.

    Returns
    -------
    SystemBlur
    """
    return SystemBlur.from_detector_dict(read_json(path, "MTF file (a limen detector JSON)"), path)


def load_defect_map(path: PathArg) -> DefectMap:
    """The defect map (defective pixels and lines from flat fields) of a ``limen detector`` JSON.

    Parameters
    ----------
    path : str or path-like
        A detector.json written by ``limen detector --flat …``.

    Returns
    -------
    DefectMap
    """
    data = read_json(path, "defect map file (a limen detector JSON)")
    entry = data.get("defect_map") if isinstance(data, dict) else None
    if not isinstance(entry, dict):
        raise LimenError("holds no defect map: run `limen detector` with flat fields (--flat) to measure one", path)
    return DefectMap.from_dict(entry, str(path))


def read_kerma_csv(path: PathArg) -> list[tuple[Path, float]]:
    """CSV with columns ``path,kerma_ugy`` (paths relative to the CSV's folder; ``#`` lines are comments).

    Each image is listed once, with a positive, finite air kerma (µGy): an image listed twice is refused (which
    line is right cannot be told), never averaged.

    Parameters
    ----------
    path : str or path-like
        The CSV file.

    Returns
    -------
    list of (Path, float)
        Each image's path (made absolute against the CSV's folder) and its air kerma in µGy, in file order.
    """
    import math

    path = Path(path)
    try:
        text = path.read_text(encoding="utf-8")
    except OSError as exc:
        raise LimenError(f"cannot read kerma CSV ({exc.strerror or exc})", path) from None
    except UnicodeDecodeError:
        raise LimenError("kerma CSV is not UTF-8 text (columns path,kerma_ugy)", path) from None
    if "\x00" in text:
        raise LimenError("kerma CSV holds NUL bytes: not a text CSV (columns path,kerma_ugy)", path)
    try:
        rows = list(csv.DictReader(ln for ln in text.splitlines() if ln.strip() and not ln.startswith("#")))
    except csv.Error as exc:
        raise LimenError(f"kerma CSV cannot be read as CSV ({exc})", path) from None
    if not rows or not {"path", "kerma_ugy"} <= set(rows[0]):
        raise LimenError("kerma CSV needs the columns path,kerma_ugy", path)
    out: list[tuple[Path, float]] = []
    first_line: dict[str, int] = {}
    for n, r in enumerate(rows, start=2):
        raw_k, raw_p = r.get("kerma_ugy"), r.get("path")
        if not isinstance(raw_p, str) or not raw_p.strip():
            raise LimenError(f"line {n}: no image path", path)
        try:
            k = float(raw_k)  # type: ignore[arg-type]  # None (a short row) raises TypeError, caught here
        except (TypeError, ValueError):
            raise LimenError(f"line {n}: kerma_ugy {short_text(raw_k)} is not a number", path) from None
        if not (math.isfinite(k) and k > 0):
            raise LimenError(f"line {n}: kerma_ugy {str(raw_k).strip()} is not a positive air kerma in µGy", path)

        p = Path(raw_p.strip())
        p = p if p.is_absolute() else path.parent / p
        key = str(p.resolve())
        if key in first_line:
            raise LimenError(
                f"line {n} lists {short_text(raw_p.strip())} again (first on line {first_line[key]}); list each "
                "image once, with its own air kerma",
                path,
            )
        first_line[key] = n
        out.append((p, k))
    return out
