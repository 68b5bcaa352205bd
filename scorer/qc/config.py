"""The nightly configuration file: which detector gets which layout, limits, conversion and alert rules.

Format ``limen-nightly/1`` (TOML, our own design)::

    format = "limen-nightly/1"
    programme = "Harbourside breast screening (invented)"   # title of the trend report

    [defaults]                  # every key here may be repeated in a [[detectors]] entry
    observer = "npw"            # npw or npwe
    methods = ["dprime", "count"]
    n_boot = 1000               # bootstrap resamples (count method CI)
    seed = 0                    # one fixed seed: re-scoring a session gives the same numbers
    min_images = 4              # a session is scored once it holds this many images
    baseline_sessions = 5       # the first K sessions of a detector form its baseline
    accept_unlisted = false     # images of detectors not listed below: quarantine (false) or defaults (true)

    [alerts]
    worse_fraction = 0.25       # alert when the CI's lower end lies more than 25 % above baseline
    control_sigma = 3.0         # Shewhart limits: baseline ± 3 σ (log10 threshold)
    ewma_lambda = 0.2           # EWMA weight λ
    ewma_width = 3.0            # EWMA limits: ± L σ √(λ/(2−λ)·(1−(1−λ)^2t))
    rules = ["baseline", "shewhart", "ewma", "limits"]
    stability_alpha = 0.01      # baseline sessions: trend test per diameter (Holm over diameters) at this level
    incomplete_hours = 36       # alert when a session stays short of min_images this long after acquisition
    silent_days = 7             # alert when a configured detector has sent nothing for this many days before
                                #   today (default 0: not checked — set it once the programme runs live)

    [smtp]                      # optional: e-mail the alerts of each run
    host = "mail.example.org"
    port = 25
    sender = "limen@example.org"
    recipients = ["physics@example.org"]
    starttls = false
    username = ""               # optional; the password is read from the environment
    password_env = "LIMEN_SMTP_PASSWORD"

    [[detectors]]
    name = "MAM2 direct"        # label in the database and reports (default: the identifier)
    detector_id = "HSX-SE-0417" # matched against DICOM Detector ID (0018,700A); or
    # device_serial = "..."     #   Device Serial Number (0018,1000); or
    # station_name = "..."      #   Station Name (0008,1010)
    layout = "plate.toml"       # default: the bundled layout
    limits = "limits.toml"
    conversion = "conversion.toml"
    mtf = "detector.json"       # from `limen detector --json`: shapes the templates
    human_factor = 1.8          # or human_factor_from = "analysis.json" (from `limen analyse --model`)
    [detectors.expected]        # acquisition settings this detector's QC images should have
    kvp = 28.0
    kvp_tolerance = 0.5
    anode = "W"                 # Anode Target Material (0018,1191)
    filter = "RH"               # Filter Material (0018,7050)
    exposure_uas = [40000, 160000]   # Exposure in µAs (0018,1153): accepted range

    [receive]                   # optional: the DICOM node of `limen receive` (see scorer/qc/receiver.py)
    ae_title = "LIMEN_QC"       # our (called) AE title, 1–16 characters (default LIMEN_QC)
    port = 11112                # TCP port (default 11112, the port registered for DICOM)
    bind = "127.0.0.1"          # address to listen on (default: this machine only; give the address the
                                #   modalities reach, or "0.0.0.0" for every interface)
    inbox = "/data/qc-inbox"    # where received images are written (the folder `limen nightly --inbox` scans)
    calling_ae_titles = ["MAM2_QC", "MAM3_QC"]   # the modalities allowed to send; any other is rejected

Relative paths are taken from the configuration file's folder.  Without a configuration
file every detector gets the bundled layout, no limits and a minimum of 4 images per
session.  Every problem raises a one-line :class:`~scorer.errors.LimenError` naming the
file and the entry.
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable

from scorer.errors import LimenError
from scorer.files import read_toml
from scorer.images.conversion import ConversionFunction
from scorer.observer.limits import HumanFactor, Limits
from scorer.observer.npw import SystemBlur
from scorer.phantom.layout import Layout
from scorer.workflow.inputs import load_conversion, load_layout, load_limits

FORMAT = "limen-nightly/1"
RULES = ("baseline", "shewhart", "ewma", "limits")
IDENTIFIERS = ("detector_id", "device_serial", "station_name")
_DETECTOR_KEYS = {
    "name",
    *IDENTIFIERS,
    "layout",
    "limits",
    "conversion",
    "mtf",
    "human_factor",
    "human_factor_from",
    "expected",
    "observer",
    "methods",
    "n_boot",
    "seed",
    "min_images",
    "baseline_sessions",
}
_DEFAULT_KEYS = {
    "observer",
    "methods",
    "n_boot",
    "seed",
    "min_images",
    "baseline_sessions",
    "accept_unlisted",
    "layout",
    "limits",
    "conversion",
}
_EXPECTED_KEYS = {"kvp", "kvp_tolerance", "anode", "filter", "exposure_uas"}
_SMTP_KEYS = {"host", "port", "sender", "recipients", "starttls", "username", "password_env", "timeout_s"}
_ALERT_KEYS = {
    "worse_fraction",
    "control_sigma",
    "ewma_lambda",
    "ewma_width",
    "rules",
    "stability_alpha",
    "incomplete_hours",
    "silent_days",
}
_RECEIVE_KEYS = {"ae_title", "port", "bind", "inbox", "calling_ae_titles"}


@dataclass(frozen=True)
class Expected:
    """Acquisition settings a detector's QC images should have (None: not checked)."""

    kvp: float | None = None
    kvp_tolerance: float = 0.5
    anode: str | None = None
    filter: str | None = None
    exposure_uas: tuple[float, float] | None = None

    def check(self, kvp, anode, filter_, exposure_uas) -> list[str]:
        """One short text per setting that differs from the expected one."""
        flags = []
        if self.kvp is not None:
            if kvp is None:
                flags.append(f"kVp not recorded (expected {self.kvp:g})")
            elif abs(kvp - self.kvp) > self.kvp_tolerance:
                flags.append(f"kVp {kvp:g} (expected {self.kvp:g} ± {self.kvp_tolerance:g})")
        for label, want, got in (("anode", self.anode, anode), ("filter", self.filter, filter_)):
            if want is not None and (got or "").upper() != want.upper():
                flags.append(f"{label} {got or 'not recorded'} (expected {want})")
        if self.exposure_uas is not None:
            lo, hi = self.exposure_uas
            if exposure_uas is None:
                flags.append("exposure not recorded")
            elif not lo <= exposure_uas <= hi:
                flags.append(f"exposure {exposure_uas / 1000:g} mAs (expected {lo / 1000:g}–{hi / 1000:g} mAs)")
        return flags


@dataclass(frozen=True)
class DetectorConfig:
    """How one detector's images are scored and judged."""

    name: str
    detector_id: str | None = None
    device_serial: str | None = None
    station_name: str | None = None
    layout: Layout | None = None
    limits: Limits | None = None
    conversion: ConversionFunction | None = None
    blur: SystemBlur | None = None
    human_factor: float | HumanFactor | None = None
    expected: Expected = Expected()
    observer: str = "npw"
    methods: tuple[str, ...] = ("dprime", "count")
    n_boot: int = 1000
    seed: int = 0
    min_images: int = 4
    baseline_sessions: int = 5

    def matches(self, detector_id, device_serial, station_name) -> bool:
        return any(
            want is not None and got is not None and want.strip() == got.strip()
            for want, got in (
                (self.detector_id, detector_id),
                (self.device_serial, device_serial),
                (self.station_name, station_name),
            )
        )


@dataclass(frozen=True)
class AlertRules:
    worse_fraction: float = 0.25
    control_sigma: float = 3.0
    ewma_lambda: float = 0.2
    ewma_width: float = 3.0
    rules: tuple[str, ...] = RULES
    stability_alpha: float = 0.01  # trend test of the baseline sessions (scorer/qc/stability.py)
    incomplete_hours: float = 36.0  # a session short of images this long after acquisition: alert
    silent_days: float = 0.0  # a configured detector silent this long before today: alert (0: not checked)


@dataclass(frozen=True)
class SmtpConfig:
    host: str
    port: int = 25
    sender: str = "limen@localhost"
    recipients: tuple[str, ...] = ()
    starttls: bool = False
    username: str | None = None
    password_env: str | None = None
    timeout_s: float = 30.0


@dataclass(frozen=True)
class ReceiveConfig:
    """The DICOM node of ``limen receive``: who we are, where we listen, whom we accept, where images go."""

    inbox: str  # absolute, or relative to the working folder when built by hand
    calling_ae_titles: tuple[str, ...]
    ae_title: str = "LIMEN_QC"
    port: int = 11112  # the port registered for DICOM (IANA service "dicom"; from memory)
    bind: str = "127.0.0.1"
    path: str | None = None  # the configuration file, named in errors


@dataclass(frozen=True)
class NightlyConfig:
    """The whole nightly configuration (see the module docstring for the file format)."""

    programme: str = "Nightly phantom QC"
    detectors: tuple[DetectorConfig, ...] = ()
    defaults: DetectorConfig = DetectorConfig(name="(default)")
    accept_unlisted: bool = True
    alerts: AlertRules = AlertRules()
    smtp: SmtpConfig | None = None
    receive: ReceiveConfig | None = None
    path: str | None = None

    def detector_for(self, detector_id, device_serial, station_name) -> DetectorConfig | None:
        """The configuration of the detector that took an image, or None when it is unknown.

        Listed detectors match on any identifier they give; an unlisted detector gets the
        defaults under the first identifier the image carries when ``accept_unlisted``.
        """
        for d in self.detectors:
            if d.matches(detector_id, device_serial, station_name):
                return d
        ident = next((v.strip() for v in (detector_id, device_serial, station_name) if v and v.strip()), None)
        if ident is None or not self.accept_unlisted:
            return None
        return dataclasses.replace(
            self.defaults, name=ident, detector_id=detector_id, device_serial=device_serial, station_name=station_name
        )

    def by_name(self, name: str) -> DetectorConfig:
        for d in self.detectors:
            if d.name == name:
                return d
        return dataclasses.replace(self.defaults, name=name)


def default_config() -> NightlyConfig:
    """No configuration file: bundled layout, no limits, four images per session, every detector accepted."""
    return NightlyConfig(defaults=DetectorConfig(name="(default)", layout=load_layout()))


def load_config(path, factor_loader: Callable | None = None, mtf_loader: Callable | None = None) -> NightlyConfig:
    """Read and validate a ``limen-nightly/1`` file; referenced files are loaded and validated too.

    Parameters
    ----------
    path : the TOML file.
    factor_loader : ``factor_loader(analysis_json, observer) -> float`` for ``human_factor_from``
        (default: :func:`scorer.workflow.human_factor_from_analysis`).
    mtf_loader : ``mtf_loader(detector_json) -> SystemBlur`` for ``mtf``
        (default: :func:`scorer.workflow.load_mtf`).
    """
    path = Path(path)
    data = read_toml(path, "nightly configuration")
    base = path.parent
    _known(data, {"format", "programme", "defaults", "alerts", "smtp", "detectors", "receive"}, path, "the file")
    if data.get("format") != FORMAT:
        raise LimenError(f'expected format = "{FORMAT}", got {data.get("format")!r}', path)
    programme = _text(data.get("programme", "Nightly phantom QC"), path, "programme")
    dflt = _table(data.get("defaults", {}), path, "[defaults]")
    _known(dflt, _DEFAULT_KEYS, path, "[defaults]")
    accept = dflt.get("accept_unlisted", False)
    if not isinstance(accept, bool):
        raise LimenError("[defaults] accept_unlisted must be true or false", path)
    from scorer.workflow.inputs import human_factor_from_analysis, load_mtf

    ctx = _Ctx(path, base, factor_loader or human_factor_from_analysis, mtf_loader or load_mtf)
    defaults = _detector(
        dict(dflt, name="(default)"), ctx, "[defaults]", DetectorConfig(name="(default)", layout=None), is_default=True
    )
    if defaults.layout is None:
        defaults = dataclasses.replace(defaults, layout=load_layout())
    rows = data.get("detectors", [])
    if not isinstance(rows, list) or not all(isinstance(r, dict) for r in rows):
        raise LimenError("[[detectors]] must be a list of tables", path)
    detectors, names, idents = [], set(), {}
    for i, row in enumerate(rows):
        where = f"detectors entry {i + 1}"
        _known(row, _DETECTOR_KEYS, path, where)
        d = _detector(row, ctx, where, defaults)
        if d.name in names:
            raise LimenError(f"{where}: name {d.name!r} is used twice", path)
        names.add(d.name)
        for key in IDENTIFIERS:
            v = getattr(d, key)
            if v is not None:
                if (key, v) in idents:
                    raise LimenError(f"{where}: {key} {v!r} is already given in {idents[(key, v)]}", path)
                idents[(key, v)] = where
        detectors.append(d)
    alerts = _alerts(_table(data.get("alerts", {}), path, "[alerts]"), path)
    smtp = _smtp(data["smtp"], path) if "smtp" in data else None
    receive = _receive(data["receive"], path) if "receive" in data else None
    return NightlyConfig(
        programme=programme,
        detectors=tuple(detectors),
        defaults=defaults,
        accept_unlisted=accept,
        alerts=alerts,
        smtp=smtp,
        receive=receive,
        path=str(path),
    )


def load_receive_config(path) -> ReceiveConfig:
    """Read the ``[receive]`` table of a ``limen-nightly/1`` file (and its format line), nothing else.

    ``limen receive`` keeps receiving while a physicist edits the detectors' layouts or limits, so it
    neither loads nor validates them; ``limen nightly`` (:func:`load_config`) validates the whole file,
    ``[receive]`` included.
    """
    path = Path(path)
    data = read_toml(path, "nightly configuration")
    if data.get("format") != FORMAT:
        raise LimenError(f'expected format = "{FORMAT}", got {data.get("format")!r}', path)
    if "receive" not in data:
        raise LimenError(
            "no [receive] table: add one with inbox and calling_ae_titles (see limen receive --help)", path
        )
    return _receive(data["receive"], path)


# --------------------------------------------------------------------------- validation helpers
@dataclass
class _Ctx:
    path: Path
    base: Path
    factor_loader: Callable | None
    mtf_loader: Callable | None
    cache: dict = field(default_factory=dict)

    def file(self, value, where, key) -> Path:
        p = Path(_text(value, self.path, f"{where}: {key}"))
        return p if p.is_absolute() else self.base / p


def _known(table: dict, allowed: set, path, where) -> None:
    extra = sorted(set(table) - allowed)
    if extra:
        raise LimenError(f"{where}: unknown key {extra[0]!r}", path)


def _table(value, path, where) -> dict:
    if not isinstance(value, dict):
        raise LimenError(f"{where} must be a table", path)
    return value


def _text(value, path, where) -> str:
    if not isinstance(value, str) or not value.strip():
        raise LimenError(f"{where} must be a non-empty string", path)
    return value.strip()


def _number(value, path, where, lo=None, hi=None, integer: bool = False):
    ok = isinstance(value, int) if integer else isinstance(value, (int, float))
    if isinstance(value, bool) or not ok:
        raise LimenError(f"{where} must be {'an integer' if integer else 'a number'}, got {value!r}", path)
    if not math.isfinite(value):  # TOML has nan and inf; every range check below is False for nan
        raise LimenError(f"{where} must be a finite number, got {value!r}", path)
    if (lo is not None and value < lo) or (hi is not None and value > hi):
        rng = f"at least {lo}" if hi is None else f"in {lo}–{hi}"
        raise LimenError(f"{where} must be {rng}, got {value!r}", path)
    return value


def _detector(row: dict, ctx: _Ctx, where: str, defaults: DetectorConfig, is_default: bool = False) -> DetectorConfig:
    path = ctx.path
    kw = {}
    for key in IDENTIFIERS:
        if key in row:
            kw[key] = _text(row[key], path, f"{where}: {key}")
    if not is_default and not kw:
        raise LimenError(f"{where}: give detector_id, device_serial or station_name", path)
    name = row.get("name") or next(iter(kw.values()), "(default)")
    kw["name"] = _text(name, path, f"{where}: name")
    if "layout" in row:
        f = ctx.file(row["layout"], where, "layout")
        if ("layout", f) not in ctx.cache:
            ctx.cache[("layout", f)] = load_layout(f)
        kw["layout"] = ctx.cache[("layout", f)]
    if "limits" in row:
        kw["limits"] = load_limits(ctx.file(row["limits"], where, "limits"))
    if "conversion" in row:
        kw["conversion"] = load_conversion(ctx.file(row["conversion"], where, "conversion"))
    observer = row.get("observer", defaults.observer)
    if observer not in ("npw", "npwe"):
        raise LimenError(f"{where}: observer must be npw or npwe, got {observer!r}", path)
    kw["observer"] = observer
    if "methods" in row:
        m = row["methods"]
        if not isinstance(m, list) or not m or any(x not in ("dprime", "count") for x in m):
            raise LimenError(f'{where}: methods must be a list of "dprime" and/or "count"', path)
        kw["methods"] = tuple(dict.fromkeys(m))
    if "n_boot" in row:
        kw["n_boot"] = _number(row["n_boot"], path, f"{where}: n_boot", 0, 100000, integer=True)
    if "seed" in row:
        kw["seed"] = _number(row["seed"], path, f"{where}: seed", 0, integer=True)
    if "min_images" in row:
        kw["min_images"] = _number(row["min_images"], path, f"{where}: min_images", 2, 1000, integer=True)
    if "baseline_sessions" in row:
        kw["baseline_sessions"] = _number(
            row["baseline_sessions"], path, f"{where}: baseline_sessions", 2, 1000, integer=True
        )
    if "human_factor" in row and "human_factor_from" in row:
        raise LimenError(f"{where}: give human_factor or human_factor_from, not both", path)
    if "human_factor" in row:
        kw["human_factor"] = float(_number(row["human_factor"], path, f"{where}: human_factor", 0.01, 100))
    if "human_factor_from" in row:
        # a HumanFactor keeps its CI, which the verdicts carry (as `limen score --human-factor-from` does)
        kw["human_factor"] = ctx.factor_loader(ctx.file(row["human_factor_from"], where, "human_factor_from"), observer)
    if "mtf" in row:
        kw["blur"] = ctx.mtf_loader(ctx.file(row["mtf"], where, "mtf"))
    if "expected" in row:
        kw["expected"] = _expected(_table(row["expected"], path, f"{where}: expected"), path, where)
    d = dataclasses.replace(defaults, **kw)
    if d.limits is not None and d.limits.observer == "human" and d.human_factor is None:
        raise LimenError(
            f"{where}: limits {d.limits.path} are for human readers; give human_factor or "
            "human_factor_from to compare model thresholds with them",
            path,
        )
    if d.limits is not None and d.limits.observer not in ("human", d.observer):
        raise LimenError(
            f"{where}: limits {d.limits.path} are for the {d.limits.observer.upper()} observer, "
            f"but this detector is scored with {d.observer.upper()}",
            path,
        )
    return d


def _expected(t: dict, path, where) -> Expected:
    where = f"{where}: expected"
    _known(t, _EXPECTED_KEYS, path, where)
    kw = {}
    if "kvp" in t:
        kw["kvp"] = float(_number(t["kvp"], path, f"{where}.kvp", 10, 200))
    if "kvp_tolerance" in t:
        kw["kvp_tolerance"] = float(_number(t["kvp_tolerance"], path, f"{where}.kvp_tolerance", 0, 50))
    for key in ("anode", "filter"):
        if key in t:
            kw[key] = _text(t[key], path, f"{where}.{key}")
    if "exposure_uas" in t:
        r = t["exposure_uas"]
        if (
            not isinstance(r, list)
            or len(r) != 2
            or any(isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v) for v in r)
            or not 0 <= r[0] <= r[1]
        ):
            raise LimenError(f"{where}.exposure_uas must be [lowest, highest] in µAs", path)
        kw["exposure_uas"] = (float(r[0]), float(r[1]))
    return Expected(**kw)


def _alerts(t: dict, path) -> AlertRules:
    _known(t, _ALERT_KEYS, path, "[alerts]")
    kw = {}
    if "worse_fraction" in t:
        kw["worse_fraction"] = float(_number(t["worse_fraction"], path, "[alerts] worse_fraction", 0, 10))
    if "control_sigma" in t:
        kw["control_sigma"] = float(_number(t["control_sigma"], path, "[alerts] control_sigma", 0.5, 10))
    if "ewma_lambda" in t:
        lam = float(_number(t["ewma_lambda"], path, "[alerts] ewma_lambda", 0, 1))
        if lam == 0:
            raise LimenError("[alerts] ewma_lambda must be above 0", path)
        kw["ewma_lambda"] = lam
    if "ewma_width" in t:
        kw["ewma_width"] = float(_number(t["ewma_width"], path, "[alerts] ewma_width", 0.5, 10))
    if "rules" in t:
        r = t["rules"]
        if not isinstance(r, list) or any(x not in RULES for x in r):
            raise LimenError(f"[alerts] rules must be a list drawn from {', '.join(RULES)}", path)
        kw["rules"] = tuple(dict.fromkeys(r))
    if "stability_alpha" in t:
        a = float(_number(t["stability_alpha"], path, "[alerts] stability_alpha", 0, 0.5))
        if a == 0:
            raise LimenError("[alerts] stability_alpha must be above 0", path)
        kw["stability_alpha"] = a
    if "incomplete_hours" in t:
        kw["incomplete_hours"] = float(_number(t["incomplete_hours"], path, "[alerts] incomplete_hours", 1, 10000))
    if "silent_days" in t:
        kw["silent_days"] = float(_number(t["silent_days"], path, "[alerts] silent_days", 0, 3650))
    return AlertRules(**kw)


def _smtp(t, path) -> SmtpConfig:
    t = _table(t, path, "[smtp]")
    _known(t, _SMTP_KEYS, path, "[smtp]")
    host = _text(t.get("host"), path, "[smtp] host")
    port = _number(t.get("port", 25), path, "[smtp] port", 1, 65535, integer=True)
    rec = t.get("recipients")
    if not isinstance(rec, list) or not rec or not all(isinstance(x, str) and "@" in x for x in rec):
        raise LimenError("[smtp] recipients must be a list of e-mail addresses", path)
    sender = _text(t.get("sender", "limen@localhost"), path, "[smtp] sender")
    starttls = t.get("starttls", False)
    if not isinstance(starttls, bool):
        raise LimenError("[smtp] starttls must be true or false", path)
    return SmtpConfig(
        host=host,
        port=port,
        sender=sender,
        recipients=tuple(rec),
        starttls=starttls,
        username=t.get("username") or None,
        password_env=t.get("password_env") or None,
        timeout_s=float(_number(t.get("timeout_s", 30.0), path, "[smtp] timeout_s", 1, 600)),
    )


def _ae_title(value, path, where) -> str:
    """An AE title as DICOM PS3.5 (section 6.2, VR AE) defines it: 1–16 characters of the default repertoire,
    no backslash, no control character; leading and trailing spaces are not significant."""
    if not isinstance(value, str):
        raise LimenError(f"{where} must be a string, got {value!r}", path)
    text = value.strip()
    if not 1 <= len(text) <= 16 or any(not " " <= ch <= "~" or ch == "\\" for ch in text):
        raise LimenError(
            f"{where} must be 1–16 printable ASCII characters without a backslash (DICOM AE title), got {value!r}",
            path,
        )
    return text


def _receive(t, path) -> ReceiveConfig:
    t = _table(t, path, "[receive]")
    _known(t, _RECEIVE_KEYS, path, "[receive]")
    if "inbox" not in t:
        raise LimenError("[receive] inbox must name the folder received images are written to", path)
    inbox = Path(_text(t["inbox"], path, "[receive] inbox")).expanduser()
    if not inbox.is_absolute():
        inbox = Path(path).parent / inbox
    callers = t.get("calling_ae_titles")
    if not isinstance(callers, list) or not callers:
        raise LimenError(
            "[receive] calling_ae_titles must list the AE titles of the modalities allowed to send "
            "(a node that accepts anyone is refused)",
            path,
        )
    titles = [_ae_title(c, path, "[receive] calling_ae_titles entry") for c in callers]
    if len(set(titles)) != len(titles):
        raise LimenError("[receive] calling_ae_titles lists an AE title twice", path)
    return ReceiveConfig(
        inbox=str(inbox.resolve()),
        calling_ae_titles=tuple(titles),
        ae_title=_ae_title(t.get("ae_title", "LIMEN_QC"), path, "[receive] ae_title"),
        port=_number(t.get("port", 11112), path, "[receive] port", 1, 65535, integer=True),
        bind=_text(t.get("bind", "127.0.0.1"), path, "[receive] bind"),
        path=str(path),
    )
