"""Public entry points of this package (read by lazy_loader.attach_stub and type checkers)."""

from . import config as config
from . import control as control
from . import inbox as inbox
from . import mail as mail
from . import nightly as nightly
from . import scale as scale
from . import receiver as receiver
from . import store as store
from . import tables as tables
from . import engine as engine
from . import schema as schema
from . import intake as intake
from . import claims as claims
from . import results as results
from . import baselines as baselines
from . import queries as queries
from . import simulated as simulated

from .config import (
    NightlyConfig as NightlyConfig,
    DetectorConfig as DetectorConfig,
    load_config as load_config,
    default_config as default_config,
    ReceiveConfig as ReceiveConfig,
    load_receive_config as load_receive_config,
)
from .store import Store as Store, open_store as open_store
from .engine import default_db_url as default_db_url
from .schema import SCHEMA_VERSION as SCHEMA_VERSION
from .control import (
    Alert as Alert,
    compute_baseline as compute_baseline,
    evaluate_session as evaluate_session,
    ewma as ewma,
    ewma_sigma_factor as ewma_sigma_factor,
)
from .scale import SessionJob as SessionJob, SessionOutcome as SessionOutcome, score_session as score_session
from .nightly import NightlyResult as NightlyResult, run_nightly as run_nightly
from .mail import send_alerts as send_alerts
from .simulated import simulate_night as simulate_night, demo_nights as demo_nights

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
