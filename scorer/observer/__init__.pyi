"""Public entry points of this package (read by lazy_loader.attach_stub and type checkers)."""

from . import bootstrap as bootstrap
from . import checks as checks
from . import defects as defects
from . import eye as eye
from . import flags as flags
from . import limits as limits
from . import mafc as mafc
from . import mafc_fast as mafc_fast
from . import npw as npw
from . import patterns as patterns
from . import psychometric as psychometric
from . import psychometric_bootstrap as psychometric_bootstrap
from . import scoring as scoring
from . import threshold as threshold
from .eye import eye_filter as eye_filter
from .limits import (
    HumanFactor as HumanFactor,
)
from .limits import (
    Limits as Limits,
)
from .limits import (
    Verdict as Verdict,
)
from .limits import (
    evaluate as evaluate,
)
from .limits import (
    overall as overall,
)
from .limits import (
    parse_human_factor as parse_human_factor,
)
from .limits import (
    parse_limits as parse_limits,
)
from .mafc import (
    DEFAULT_DETECTABILITY as DEFAULT_DETECTABILITY,
)
from .mafc import (
    Detectability as Detectability,
)
from .mafc import (
    criterion_for as criterion_for,
)
from .mafc import (
    dprime_for_pc as dprime_for_pc,
)
from .mafc import (
    halfway_criterion as halfway_criterion,
)
from .mafc import (
    pc_mafc as pc_mafc,
)
from .npw import (
    ObserverConfig as ObserverConfig,
)
from .npw import (
    SystemBlur as SystemBlur,
)
from .npw import (
    decide as decide,
)
from .npw import (
    estimate_blur as estimate_blur,
)
from .npw import (
    score_image as score_image,
)
from .psychometric import PsychometricFit as PsychometricFit
from .psychometric import fit_psychometric as fit_psychometric
from .scoring import ScoreResult as ScoreResult
from .scoring import score_images as score_images
from .threshold import (
    ThresholdCurve as ThresholdCurve,
)
from .threshold import (
    ThresholdPoint as ThresholdPoint,
)
from .threshold import (
    count_thresholds as count_thresholds,
)
from .threshold import (
    dprime_thresholds as dprime_thresholds,
)
from .threshold import (
    smooth_curve as smooth_curve,
)

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
