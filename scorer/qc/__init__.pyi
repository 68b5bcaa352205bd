"""Public entry points of this package (read by lazy_loader.attach_stub and type checkers)."""

from . import baselines as baselines
from . import claims as claims
from . import config as config
from . import control as control
from . import engine as engine
from . import inbox as inbox
from . import intake as intake
from . import mail as mail
from . import nightly as nightly
from . import queries as queries
from . import receiver as receiver
from . import results as results
from . import scale as scale
from . import schema as schema
from . import simulated as simulated
from . import store as store
from . import tables as tables
from .config import (
    DetectorConfig as DetectorConfig,
)
from .config import (
    NightlyConfig as NightlyConfig,
)
from .config import (
    ReceiveConfig as ReceiveConfig,
)
from .config import (
    default_config as default_config,
)
from .config import (
    load_config as load_config,
)
from .config import (
    load_receive_config as load_receive_config,
)
from .control import (
    Alert as Alert,
)
from .control import (
    compute_baseline as compute_baseline,
)
from .control import (
    evaluate_session as evaluate_session,
)
from .control import (
    ewma as ewma,
)
from .control import (
    ewma_sigma_factor as ewma_sigma_factor,
)
from .engine import default_db_url as default_db_url
from .mail import send_alerts as send_alerts
from .nightly import NightlyResult as NightlyResult
from .nightly import run_nightly as run_nightly
from .scale import SessionJob as SessionJob
from .scale import SessionOutcome as SessionOutcome
from .scale import score_session as score_session
from .schema import SCHEMA_VERSION as SCHEMA_VERSION
from .simulated import demo_nights as demo_nights
from .simulated import simulate_night as simulate_night
from .store import Store as Store
from .store import open_store as open_store

__all__ = [
    "config",
    "control",
    "inbox",
    "mail",
    "nightly",
    "scale",
    "receiver",
    "store",
    "tables",
    "engine",
    "schema",
    "intake",
    "claims",
    "results",
    "baselines",
    "queries",
    "simulated",
    "NightlyConfig",
    "DetectorConfig",
    "load_config",
    "default_config",
    "ReceiveConfig",
    "load_receive_config",
    "Store",
    "open_store",
    "default_db_url",
    "SCHEMA_VERSION",
    "Alert",
    "compute_baseline",
    "evaluate_session",
    "ewma",
    "ewma_sigma_factor",
    "SessionJob",
    "SessionOutcome",
    "score_session",
    "NightlyResult",
    "run_nightly",
    "send_alerts",
    "simulate_night",
    "demo_nights",
]
