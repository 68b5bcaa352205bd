"""Every public function and class of the scorer packages has a numpy-style docstring (issue 22).

The public names are those each package lists in its ``__init__.pyi`` (its ``__all__``, read by
``lazy_loader.attach_stub``).  The docstring is parsed by numpydoc's own parser (``numpydoc.docscrape``, the
numpydoc docstring standard: https://numpydoc.readthedocs.io/en/latest/format.html):

* a function has a Parameters section when it takes parameters, and a Returns (or Yields) section unless it is
  annotated to return None;
* a class has a Parameters or an Attributes section.

Names whose docstring is still to be written are listed in PENDING and marked xfail(strict=True): the test fails
once one of them is fixed, so the list only shrinks (remove the name when its docstring is done).
"""

from __future__ import annotations

import importlib
import inspect
import warnings

import pytest
from numpydoc.docscrape import ClassDoc, FunctionDoc

PACKAGES = [
    "scorer.images",
    "scorer.phantom",
    "scorer.observer",
    "scorer.detector",
    "scorer.study",
    "scorer.workflow",
    "scorer.qc",
    "scorer.reports",
]

# docstrings still to be brought to the numpydoc form (issue 22); each entry is "package.name"
PENDING: set[str] = {
    "scorer.detector.DetectorMetrics",
    "scorer.detector.DetectorModel",
    "scorer.detector.Pose",
    "scorer.detector.PredictedThreshold",
    "scorer.detector.SimulatedImage",
    "scorer.detector.background_kerma_ugy",
    "scorer.detector.check_detector_json",
    "scorer.detector.check_dose_json",
    "scorer.detector.compare",
    "scorer.detector.compare_series",
    "scorer.detector.compute_dqe",
    "scorer.detector.detector_model",
    "scorer.detector.detector_model_from_dict",
    "scorer.detector.dicom_tags",
    "scorer.detector.dose_series",
    "scorer.detector.fit_components",
    "scorer.detector.fit_power_law",
    "scorer.detector.group_by_kerma",
    "scorer.detector.group_flats",
    "scorer.detector.kerma_ratio",
    "scorer.detector.mean_mtf",
    "scorer.detector.measure_detector",
    "scorer.detector.measure_mtf",
    "scorer.detector.measure_nnps",
    "scorer.detector.measure_noise_series",
    "scorer.detector.predict_from_detector",
    "scorer.detector.predict_thresholds",
    "scorer.detector.scored_thresholds",
    "scorer.detector.simulate",
    "scorer.observer.Detectability",
    "scorer.observer.HumanFactor",
    "scorer.observer.Limits",
    "scorer.observer.ObserverConfig",
    "scorer.observer.ScoreResult",
    "scorer.observer.SystemBlur",
    "scorer.observer.ThresholdCurve",
    "scorer.observer.ThresholdPoint",
    "scorer.observer.Verdict",
    "scorer.observer.count_thresholds",
    "scorer.observer.criterion_for",
    "scorer.observer.decide",
    "scorer.observer.dprime_for_pc",
    "scorer.observer.dprime_thresholds",
    "scorer.observer.estimate_blur",
    "scorer.observer.evaluate",
    "scorer.observer.eye_filter",
    "scorer.observer.halfway_criterion",
    "scorer.observer.overall",
    "scorer.observer.parse_human_factor",
    "scorer.observer.parse_limits",
    "scorer.observer.pc_mafc",
    "scorer.observer.score_image",
    "scorer.observer.score_images",
    "scorer.observer.smooth_curve",
    "scorer.phantom.Layout",
    "scorer.phantom.Marker",
    "scorer.phantom.PhantomTransform",
    "scorer.phantom.Target",
    "scorer.phantom.default_layout_path",
    "scorer.phantom.disc_coverage",
    "scorer.phantom.load_layout",
    "scorer.phantom.parse_layout",
    "scorer.qc.Alert",
    "scorer.qc.DetectorConfig",
    "scorer.qc.NightlyConfig",
    "scorer.qc.NightlyResult",
    "scorer.qc.ReceiveConfig",
    "scorer.qc.SessionJob",
    "scorer.qc.SessionOutcome",
    "scorer.qc.Store",
    "scorer.qc.default_config",
    "scorer.qc.default_db_url",
    "scorer.qc.demo_nights",
    "scorer.qc.evaluate_session",
    "scorer.qc.ewma",
    "scorer.qc.ewma_sigma_factor",
    "scorer.qc.load_config",
    "scorer.qc.load_receive_config",
    "scorer.qc.open_store",
    "scorer.qc.run_nightly",
    "scorer.qc.score_session",
    "scorer.qc.send_alerts",
    "scorer.qc.simulate_night",
    "scorer.reports.compare_report_html",
    "scorer.reports.detector_report_html",
    "scorer.reports.dumps",
    "scorer.reports.figure_to_svg",
    "scorer.reports.html_page",
    "scorer.reports.table_html",
    "scorer.reports.write_json",
    "scorer.reports.write_outputs",
    "scorer.reports.write_score_outputs",
    "scorer.study.Analysis",
    "scorer.study.PowerPlan",
    "scorer.study.PrecisionPlan",
    "scorer.study.ReaderPopulation",
    "scorer.study.ThresholdEstimate",
    "scorer.study.agreement_summary",
    "scorer.study.analyse_study",
    "scorer.study.compare_groups",
    "scorer.study.draw_readers",
    "scorer.study.estimate",
    "scorer.study.expected_entropy",
    "scorer.study.human_model_factor",
    "scorer.study.new_state",
    "scorer.study.next_cell",
    "scorer.study.next_level",
    "scorer.study.plate_levels",
    "scorer.study.population_from_analysis",
    "scorer.study.posterior",
    "scorer.study.power_by_simulation",
    "scorer.study.readers_from_responses",
    "scorer.study.state_from_json",
    "scorer.study.trials_for_precision",
    "scorer.study.update",
    "scorer.study.validate_trials",
    "scorer.workflow.load_layout",
}


def _public_objects() -> list[tuple[str, object]]:
    out = []
    for pkg in PACKAGES:
        module = importlib.import_module(pkg)
        for name in sorted(module.__all__):
            obj = getattr(module, name)
            if inspect.ismodule(obj) or not (inspect.isclass(obj) or callable(obj)):
                continue  # sub-modules and constants carry no Parameters/Returns
            out.append((f"{pkg}.{name}", obj))
    return out


def _section(doc: FunctionDoc | ClassDoc, name: str) -> list[object]:
    return list(doc[name])


def docstring_problems(obj: object) -> list[str]:
    """What the numpydoc docstring of ``obj`` lacks (empty when it is complete)."""
    if not (inspect.getdoc(obj) or "").strip():
        return ["no docstring"]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # numpydoc warns about unknown sections; the checks below decide
        if inspect.isclass(obj):
            cdoc = ClassDoc(obj, config={"show_class_members": False})
            if not (_section(cdoc, "Parameters") or _section(cdoc, "Attributes")):
                return ["no Parameters or Attributes section"]
            return []
        fdoc = FunctionDoc(obj)
    problems = []
    try:
        sig = inspect.signature(obj)  # type: ignore[arg-type]  # callables only reach here
    except (TypeError, ValueError):
        sig = None
    takes_parameters = sig is None or any(p.name not in ("self", "cls") for p in sig.parameters.values())
    if takes_parameters and not _section(fdoc, "Parameters"):
        problems.append("no Parameters section")
    returns_none = sig is not None and sig.return_annotation in (None, "None")
    if not returns_none and not (_section(fdoc, "Returns") or _section(fdoc, "Yields")):
        problems.append("no Returns section")
    return problems


OBJECTS = _public_objects()


@pytest.mark.parametrize(
    "name, obj",
    [
        pytest.param(
            name,
            obj,
            id=name,
            marks=[pytest.mark.xfail(strict=True, reason="docstring pending (issue 22)")] if name in PENDING else [],
        )
        for name, obj in OBJECTS
    ],
)
def test_public_docstring_is_numpydoc(name: str, obj: object) -> None:
    problems = docstring_problems(obj)
    assert not problems, f"{name}: {'; '.join(problems)}"


def test_pending_names_are_public() -> None:
    """A stale entry in PENDING (renamed or no longer public) is removed rather than kept."""
    assert PENDING <= {name for name, _ in OBJECTS}


def test_checker_finds_missing_sections() -> None:
    """The checker itself: a bare one-line docstring fails, a complete numpydoc one passes."""

    def bare(x: int) -> int:
        """Twice x."""
        return 2 * x

    def complete(x: int) -> int:
        """Twice x.

        Parameters
        ----------
        x : int
            A number.

        Returns
        -------
        int
            Twice ``x``.
        """
        return 2 * x

    assert docstring_problems(bare) == ["no Parameters section", "no Returns section"]
    assert docstring_problems(complete) == []
