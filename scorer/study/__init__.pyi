"""Public entry points of this package (read by lazy_loader.attach_stub and type checkers)."""

from . import adaptive as adaptive
from . import agreement as agreement
from . import alternatives as alternatives
from . import analysis as analysis
from . import counts as counts
from . import group_comparison as group_comparison
from . import human_factor as human_factor
from . import planning as planning
from . import pooled_gee as pooled_gee
from . import precision as precision
from . import reader_fits as reader_fits
from . import reader_model as reader_model
from . import trials as trials
from . import wording as wording
from .adaptive import (
    AdaptiveState as AdaptiveState,
)
from .adaptive import (
    ThresholdEstimate as ThresholdEstimate,
)
from .adaptive import (
    estimate as estimate,
)
from .adaptive import (
    expected_entropy as expected_entropy,
)
from .adaptive import (
    new_state as new_state,
)
from .adaptive import (
    next_cell as next_cell,
)
from .adaptive import (
    next_level as next_level,
)
from .adaptive import (
    plate_levels as plate_levels,
)
from .adaptive import (
    posterior as posterior,
)
from .adaptive import (
    state_from_json as state_from_json,
)
from .adaptive import (
    update as update,
)
from .agreement import agreement_summary as agreement_summary
from .analysis import (
    Analysis as Analysis,
)
from .analysis import (
    analyse_study as analyse_study,
)
from .group_comparison import compare_groups as compare_groups
from .human_factor import human_model_factor as human_model_factor
from .planning import (
    PowerPlan as PowerPlan,
)
from .planning import (
    population_from_analysis as population_from_analysis,
)
from .planning import (
    power_by_simulation as power_by_simulation,
)
from .precision import PrecisionPlan as PrecisionPlan
from .precision import trials_for_precision as trials_for_precision
from .reader_model import (
    ReaderPopulation as ReaderPopulation,
)
from .reader_model import (
    draw_readers as draw_readers,
)
from .reader_model import (
    readers_from_responses as readers_from_responses,
)
from .reader_model import (
    simulate_reader_study as simulate_reader_study,
)
from .trials import validate_trials as validate_trials

__all__ = [
    "agreement",
    "alternatives",
    "analysis",
    "counts",
    "group_comparison",
    "human_factor",
    "pooled_gee",
    "reader_fits",
    "reader_model",
    "trials",
    "wording",
    "Analysis",
    "analyse_study",
    "validate_trials",
    "human_model_factor",
    "compare_groups",
    "agreement_summary",
    "ReaderPopulation",
    "draw_readers",
    "simulate_reader_study",
    "readers_from_responses",
    "planning",
    "PowerPlan",
    "power_by_simulation",
    "population_from_analysis",
    "adaptive",
    "precision",
    "AdaptiveState",
    "ThresholdEstimate",
    "new_state",
    "next_level",
    "update",
    "estimate",
    "expected_entropy",
    "posterior",
    "state_from_json",
    "next_cell",
    "plate_levels",
    "PrecisionPlan",
    "trials_for_precision",
]
