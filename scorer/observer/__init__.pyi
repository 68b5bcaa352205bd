"""Public entry points of this package (read by lazy_loader.attach_stub and type checkers)."""

from . import checks as checks
from . import defects as defects
from . import eye as eye
from . import flags as flags
from . import limits as limits
from . import bootstrap as bootstrap
from . import mafc as mafc
from . import mafc_fast as mafc_fast
from . import npw as npw
from . import patterns as patterns
from . import psychometric as psychometric
from . import psychometric_bootstrap as psychometric_bootstrap
from . import scoring as scoring
from . import threshold as threshold

from .npw import (
    ObserverConfig as ObserverConfig,
    SystemBlur as SystemBlur,
    score_image as score_image,
    decide as decide,
    estimate_blur as estimate_blur,
)
from .eye import eye_filter as eye_filter
from .mafc import (
    pc_mafc as pc_mafc,
    dprime_for_pc as dprime_for_pc,
    halfway_criterion as halfway_criterion,
    criterion_for as criterion_for,
    Detectability as Detectability,
    DEFAULT_DETECTABILITY as DEFAULT_DETECTABILITY,
)
from .psychometric import fit_psychometric as fit_psychometric, PsychometricFit as PsychometricFit
from .threshold import (
    ThresholdCurve as ThresholdCurve,
    ThresholdPoint as ThresholdPoint,
    dprime_thresholds as dprime_thresholds,
    count_thresholds as count_thresholds,
    smooth_curve as smooth_curve,
)
from .limits import (
    HumanFactor as HumanFactor,
    parse_human_factor as parse_human_factor,
    Limits as Limits,
    Verdict as Verdict,
    parse_limits as parse_limits,
    evaluate as evaluate,
    overall as overall,
)
from .scoring import ScoreResult as ScoreResult, score_images as score_images

__all__ = [
    "checks",
    "defects",
    "eye",
    "flags",
    "limits",
    "bootstrap",
    "mafc",
    "mafc_fast",
    "npw",
    "patterns",
    "psychometric",
    "psychometric_bootstrap",
    "scoring",
    "threshold",
    "ObserverConfig",
    "SystemBlur",
    "score_image",
    "decide",
    "estimate_blur",
    "eye_filter",
    "pc_mafc",
    "dprime_for_pc",
    "halfway_criterion",
    "criterion_for",
    "Detectability",
    "DEFAULT_DETECTABILITY",
    "fit_psychometric",
    "PsychometricFit",
    "ThresholdCurve",
    "ThresholdPoint",
    "dprime_thresholds",
    "count_thresholds",
    "smooth_curve",
    "HumanFactor",
    "parse_human_factor",
    "Limits",
    "Verdict",
    "parse_limits",
    "evaluate",
    "overall",
    "ScoreResult",
    "score_images",
]
