"""The JSON files Limen writes and reads back: ``limen detector``, ``limen score`` and ``limen dose-series``
outputs, read here and checked by :mod:`scorer.detector.comparison`."""

from __future__ import annotations

from typing import Any

from scorer.detector.comparison import check_detector_json, check_dose_json, scored_thresholds
from scorer.files import PathArg, read_json


def load_detector_json(path: PathArg) -> dict[str, Any]:
    """A ``limen detector`` JSON (detector.json): MTF, NNPS and/or DQE curves, checked.

    Parameters
    ----------
    path : str or path-like
        detector.json.

    Returns
    -------
    dict
        Its content, checked.
    """
    return check_detector_json(read_json(path, "detector JSON"), path)


def load_dose_json(path: PathArg) -> dict[str, Any]:
    """A ``limen dose-series --json`` output (keys "groups" and "fits"), checked.

    Parameters
    ----------
    path : str or path-like
        The JSON file.

    Returns
    -------
    dict
        Its content, checked.
    """
    return check_dose_json(read_json(path, "dose-series JSON"), path)


def load_scored_json(path: PathArg) -> list[dict[str, Any]]:
    """Thresholds from a ``limen score --json`` output (key "thresholds").

    Parameters
    ----------
    path : str or path-like
        The JSON file.

    Returns
    -------
    list of dict
        One record per threshold point.
    """
    return scored_thresholds(read_json(path, "score JSON"), path)
