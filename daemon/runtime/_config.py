"""The station configuration: one TOML file, validated as a whole before anything starts.

Theory of operation
-------------------
``load_config(path)`` reads the file, applies ``CLAMPD__SECTION__KEY=value`` environment
overrides on top (double underscore nests; a numeric part indexes an array of tables, e.g.
``CLAMPD__WRENCH__0__ADDRESS``), validates everything with pydantic (unknown keys are
errors: a typo must not silently fall back to a default on a production line), then runs the
checks that need the file system (referenced files exist) and collects warnings (secrets
readable by others, calibration due soon or overdue). Every problem comes back at once in
one ``ConfigError`` with a field path per problem, so a technician fixes the file in one
pass; warnings are returned, never printed, so the caller decides where they go.

Security defaults
-----------------
A plaintext ``mqtt://`` connection to anything but the loopback host is refused unless
``allow_plaintext_remote = true`` is set: results and the command topic (which can lock a
station) must not cross a plant network unencrypted by accident.

Programs
--------
``[[program]]`` tables use the same keys as program files and are validated through the
engine's ``program_from_mapping`` (its problems keep their field paths, prefixed with
``program[i]``); the validated config keeps them as plain mappings for the engine to load.
"""

from __future__ import annotations

import dataclasses
import datetime as dt
import enum
import grp
import ipaddress
import os
import re
import stat
import tomllib
import urllib.parse
from collections.abc import Mapping
from pathlib import Path
from typing import Annotated, Any, Literal, Self

import pydantic
from pydantic import BaseModel, ConfigDict, Field, SecretStr

from clampd.protocol import (
    DeclarativeProfile,
    Kind,
    ProfileError,
    UnitError,
    load_builtin_profile,
    load_profile,
    parse_quantity,
)

__all__ = [
    "CALIBRATION_DUE_SOON_DAYS",
    "ENV_PREFIX",
    "SERVICE_GROUP",
    "AlarmsConfig",
    "BrokerConfig",
    "CalibrationState",
    "ConfigError",
    "ConfigProblem",
    "CuesConfig",
    "JournalConfig",
    "LoadedConfig",
    "OutboxConfig",
    "PlaintextRemoteError",
    "StationConfig",
    "StationSection",
    "ViewConfig",
    "WrenchConfig",
    "apply_env_overrides",
    "calibration_state",
    "check_broker_transport",
    "load_config",
    "parse_config",
    "sensor_profile",
]

ENV_PREFIX = "CLAMPD__"
# The system group the daemon runs in (deploy/BOARD.md); it may read secret files.
SERVICE_GROUP = "clampd"
# Warn two weeks ahead of a calibration due date, so a replacement tool or a calibration
# slot can be arranged (common practice, no source).
CALIBRATION_DUE_SOON_DAYS = 14

_ID = r"^[A-Za-z0-9][A-Za-z0-9_.-]{0,63}$"
_MAC = re.compile(r"^[0-9A-Fa-f]{2}(:[0-9A-Fa-f]{2}){5}$")
_LOOPBACK_NAMES = frozenset({"localhost", "localhost.localdomain", "ip6-localhost"})


class ConfigProblem(BaseModel):
    """One problem: the dotted field path (``wrench[1].address``) and what is wrong."""

    model_config = ConfigDict(frozen=True)
    path: str
    message: str

    def __str__(self) -> str:
        return f"{self.path}: {self.message}" if self.path else self.message


class ConfigError(ValueError):
    """The configuration is unusable; ``problems`` lists every reason with its field path.

    Always the file's (or the environment's) fault, never clampd's.
    """

    def __init__(self, problems: list[ConfigProblem], source: str = "") -> None:
        self.problems = tuple(problems)
        self.source = source
        head = f"{source}: " if source else ""
        lines = "\n".join(f"  {p}" for p in self.problems)
        super().__init__(f"{head}{len(self.problems)} configuration problem(s)\n{lines}")


class PlaintextRemoteError(ValueError):
    """A plaintext MQTT URL points to a non-loopback host without an explicit opt-in."""


class CalibrationState(enum.Enum):
    """Where a wrench stands against its calibration due date."""

    OK = "ok"
    DUE_SOON = "due_soon"
    OVERDUE = "overdue"


def calibration_state(
    due: dt.date, today: dt.date, *, soon_days: int = CALIBRATION_DUE_SOON_DAYS
) -> CalibrationState:
    """Classify ``today`` against a calibration ``due`` date.

    The due date itself is still usable (DUE_SOON); the day after it is OVERDUE.
    """
    if today > due:
        return CalibrationState.OVERDUE
    if (due - today).days <= soon_days:
        return CalibrationState.DUE_SOON
    return CalibrationState.OK


def _is_loopback(host: str) -> bool:
    if host.lower() in _LOOPBACK_NAMES:
        return True
    try:
        return ipaddress.ip_address(host).is_loopback
    except ValueError:
        return False


def check_broker_transport(url: str, allow_plaintext_remote: bool) -> None:
    """Refuse ``mqtt://`` to a non-loopback host unless explicitly allowed.

    Raises ``PlaintextRemoteError`` naming the host and the opt-in key. ``mqtts://`` and
    loopback hosts always pass.
    """
    parts = urllib.parse.urlsplit(url)
    if parts.scheme != "mqtt" or allow_plaintext_remote:
        return
    host = parts.hostname or ""
    if not _is_loopback(host):
        raise PlaintextRemoteError(
            f"plaintext mqtt:// to non-loopback host {host!r} is refused; use mqtts:// "
            "(TLS) or set allow_plaintext_remote = true if the network is trusted"
        )


def _torque(value: Any) -> Any:
    if isinstance(value, str | int | float) and not isinstance(value, bool):
        try:
            return parse_quantity(value, Kind.TORQUE)
        except UnitError as exc:
            raise ValueError(str(exc)) from None
    return value


def _stiffness(value: Any) -> Any:
    if isinstance(value, str):
        try:
            return parse_quantity(value, Kind.STIFFNESS)
        except UnitError as exc:
            raise ValueError(str(exc)) from None
    return value


TorqueNm = Annotated[float, pydantic.BeforeValidator(_torque), Field(gt=0.0)]
StiffnessDegPerNm = Annotated[float, pydantic.BeforeValidator(_stiffness), Field(ge=0.0)]


class _Section(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True, str_strip_whitespace=True)


class StationSection(_Section):
    """Identity of the station and the root of its MQTT topics."""

    id: str = Field(pattern=_ID)
    name: str = Field(min_length=1, max_length=200)
    # ISA-95-style hierarchy, e.g. "site/area/line/station"; the daemon adds its own levels.
    topic_prefix: str = Field(min_length=1, max_length=200)

    @pydantic.field_validator("topic_prefix")
    @classmethod
    def _valid_prefix(cls, v: str) -> str:
        if any(c in v for c in "+#\0"):
            raise ValueError("must not contain MQTT wildcards (+, #) or NUL")
        if v.startswith("$"):
            raise ValueError("must not start with '$' (reserved for broker topics)")
        if v.startswith("/") or v.endswith("/") or "//" in v:
            raise ValueError("levels must be non-empty: no leading, trailing or double '/'")
        return v


class BrokerConfig(_Section):
    """How to reach the plant broker. Secrets: ``password`` inline or ``password_file``."""

    # Declared before url so url's validator can read it (pydantic validates in order).
    allow_plaintext_remote: bool = False
    url: str
    client_id: str | None = Field(default=None, min_length=1, max_length=128)
    username: str | None = None
    password: SecretStr | None = None
    password_file: Path | None = None
    tls_ca: Path | None = None
    tls_cert: Path | None = None
    tls_key: Path | None = None
    protocol: Literal["auto", "5", "3.1.1"] = "auto"
    # 30 s: a dead link is noticed within 45 s (1.5 × keepalive, MQTT 5.0 §3.1.2.10) without
    # loading the broker with pings from many stations (our own choice).
    keepalive_s: int = Field(default=30, ge=5, le=65535)

    @pydantic.field_validator("url")
    @classmethod
    def _valid_url(cls, v: str, info: pydantic.ValidationInfo) -> str:
        parts = urllib.parse.urlsplit(v)
        if parts.scheme not in ("mqtt", "mqtts"):
            raise ValueError(f"scheme must be mqtt:// or mqtts://, got {parts.scheme!r}")
        if not parts.hostname:
            raise ValueError("has no host")
        try:
            _ = parts.port
        except ValueError:
            raise ValueError("has an invalid port") from None
        if parts.path not in ("", "/") or parts.query or parts.fragment:
            raise ValueError("must be scheme://host[:port] only")
        if parts.username or parts.password:
            raise ValueError("must not carry credentials; use username and password_file")
        check_broker_transport(v, bool(info.data.get("allow_plaintext_remote", False)))
        return v

    @pydantic.model_validator(mode="after")
    def _consistent(self) -> Self:
        if self.password is not None and self.password_file is not None:
            raise ValueError("set either password or password_file, not both")
        if (self.tls_cert is None) != (self.tls_key is None):
            raise ValueError("tls_cert and tls_key go together")
        tls_given = any(p is not None for p in (self.tls_ca, self.tls_cert, self.tls_key))
        if tls_given and self.url.startswith("mqtt://"):
            raise ValueError("TLS files are set but the url is plaintext mqtt://; use mqtts://")
        return self

    @property
    def host(self) -> str:
        """Host name from the URL."""
        return urllib.parse.urlsplit(self.url).hostname or ""

    @property
    def port(self) -> int:
        """Port from the URL, else the IANA default (1883 plain, 8883 TLS)."""
        parts = urllib.parse.urlsplit(self.url)
        return parts.port or (8883 if parts.scheme == "mqtts" else 1883)

    @property
    def tls(self) -> bool:
        """True for mqtts://."""
        return self.url.startswith("mqtts://")

    def read_password(self) -> str | None:
        """The password, read from ``password_file`` if given (trailing newline removed)."""
        if self.password is not None:
            return self.password.get_secret_value()
        if self.password_file is not None:
            return self.password_file.read_text(encoding="utf-8").rstrip("\r\n")
        return None


class WrenchConfig(_Section):
    """One wrench the station may connect to; its BLE address is the allow-list entry."""

    id: str = Field(pattern=_ID)
    address: str
    # "v1" (protocol/PROFILE.md), the name of a shipped declarative sensor profile, or the
    # path of one ending in ".toml" (relative to the station file); checked at load time.
    profile: str = Field(default="v1", min_length=1)
    axis: Literal["+x", "-x", "+y", "-y", "+z", "-z"] = "+z"
    # Rated capacity; accepts units ("150 N*m", "110 ft*lbf").
    torque_max_nm: TorqueNm = Field(alias="torque_max")
    deflection_deg_per_nm: StiffnessDegPerNm = 0.0
    # Multiplies the sensor's torque; a calibration certificate's correction is a few
    # percent at most, so a factor outside 0.8–1.25 is almost surely a typo (our own bound).
    calibration_factor: float = Field(default=1.0, ge=0.8, le=1.25)
    calibration_due: dt.date | None = None
    block_when_calibration_overdue: bool = True

    @pydantic.field_validator("address")
    @classmethod
    def _valid_address(cls, v: str) -> str:
        if not _MAC.match(v):
            raise ValueError("must be a BLE address like 'C4:7A:10:00:3E:21'")
        return v.upper()


class CuesConfig(_Section):
    """Where cue sounds go and the timing the engine's predictive stop cue uses."""

    output: Literal["device", "wav", "none"] = "device"
    wav_dir: Path | None = None
    volume: float = Field(default=0.8, ge=0.0, le=1.0)
    # A person needs about 0.15–0.25 s to react to a sound (DESIGN.md domain notes;
    # common practice, no source): 0.2 s is the middle of that range.
    reaction_time_s: float = Field(default=0.2, ge=0.0, le=1.0)
    # From play() to sound; a persistent output stream on a small board is tens of ms
    # (our own estimate; the players measure it, see _cues.py).
    latency_s: float = Field(default=0.05, ge=0.0, le=0.5)

    @pydantic.model_validator(mode="after")
    def _wav_needs_dir(self) -> Self:
        if self.output == "wav" and self.wav_dir is None:
            raise ValueError("output = 'wav' needs wav_dir")
        return self


class OutboxConfig(_Section):
    """The durable outbox and journal file, with its retention and size cap."""

    path: Path = Path("/var/lib/clampd/outbox.sqlite3")
    # Defaults match clampd.daemon.runtime._outbox (reasons there).
    retention_days: float = Field(default=90.0, gt=0.0, le=3650.0)
    size_cap_mb: float = Field(default=512.0, gt=0.0)

    @property
    def size_cap_bytes(self) -> int:
        """The cap in bytes (MiB × 1 048 576)."""
        return int(self.size_cap_mb * 1024 * 1024)


class JournalConfig(_Section):
    """How the local journal (the outbox's rows) is shown by ``clampd results``."""

    # One screen of a terminal on the station (our own choice).
    list_limit: int = Field(default=20, ge=1, le=10_000)


class ViewConfig(_Section):
    """The station view: a read-only local web page with live updates (``clampd.daemon.view``).

    Loopback by default: the page has no log-in, so it reaches the network only when the
    bind address says so (a line lead's desktop), and ``check-config`` warns then.
    """

    enabled: bool = True
    # An IP address literal (or "localhost"): a host name here would be resolved at start and
    # could bind somewhere unexpected.
    bind: str = "127.0.0.1"
    # 8740: an unprivileged port outside the common web ports (our choice); 0 picks a free one.
    port: int = Field(default=8740, ge=0, le=65535)

    @pydantic.field_validator("bind")
    @classmethod
    def _valid_bind(cls, v: str) -> str:
        if v == "localhost":
            return "127.0.0.1"
        try:
            return str(ipaddress.ip_address(v))
        except ValueError:
            raise ValueError("must be an IP address such as 127.0.0.1 or 0.0.0.0") from None


class AlarmsConfig(_Section):
    """When the station raises and clears its alarms (``clampd.daemon.runtime._alarms``).

    Each raise level has a clear level apart from it, so a reading near a threshold raises
    one alarm and clears it once, not over and over.
    """

    # At or below 15 % a wrench still has charge to finish the job in hand before its
    # battery is swapped (our choice).
    battery_low_pct: int = Field(default=15, ge=1, le=99)
    # Cleared at or above 25 %: ten points above the raise level, wider than the few points
    # a cell's reading moves under load, so the alarm does not flap (our choice).
    battery_ok_pct: int = Field(default=25, ge=2, le=100)
    # A link down this long raises wrench_lost; the link's reconnect loop starts at 0.5 s
    # and doubles (_backoff.py), so a wrench carried briefly out of range and back within
    # half a minute raises nothing (our choice).
    wrench_lost_after_s: float = Field(default=30.0, ge=0.1, le=86_400.0)
    # Three NOK in a row of one wrench on one program: with a NOK rate of 1 % that happens by
    # chance once in a million runs of three, so it points at the tool, the parts or the
    # program (our choice).
    nok_streak: int = Field(default=3, ge=2, le=1000)
    # Unsent results beyond this count, or the oldest unsent older than the age below,
    # raise outbox_backlog; cleared once the outbox is drained. 500 is hours of a hand
    # station's work (a rundown every 10 to 30 s, common practice, no source).
    outbox_backlog_count: int = Field(default=500, ge=1)
    # Five minutes: well past a broker restart and the MQTT reconnect back-off's 30 s cap
    # (_backoff.py), so only an outage someone should look at raises it (our choice).
    outbox_backlog_age_s: float = Field(default=300.0, ge=1.0, le=30 * 86_400.0)
    # calibration_due_soon this many days ahead of the due date, like the config check
    # and the wrench status (CALIBRATION_DUE_SOON_DAYS; common practice, no source).
    calibration_due_soon_days: int = Field(default=CALIBRATION_DUE_SOON_DAYS, ge=0, le=365)

    @pydantic.model_validator(mode="after")
    def _clear_above_raise(self) -> Self:
        if self.battery_ok_pct <= self.battery_low_pct:
            raise ValueError("battery_ok_pct must be above battery_low_pct (hysteresis)")
        return self


class StationConfig(_Section):
    """The whole station file."""

    station: StationSection
    broker: BrokerConfig
    wrench: list[WrenchConfig] = Field(default_factory=list)
    program: list[dict[str, Any]] = Field(default_factory=list)
    cues: CuesConfig = CuesConfig()
    outbox: OutboxConfig = OutboxConfig()
    journal: JournalConfig = JournalConfig()
    view: ViewConfig = ViewConfig()
    alarms: AlarmsConfig = AlarmsConfig()

    @pydantic.field_validator("wrench")
    @classmethod
    def _unique_wrenches(cls, v: list[WrenchConfig]) -> list[WrenchConfig]:
        for attr in ("id", "address"):
            seen: set[str] = set()
            for w in v:
                value = getattr(w, attr)
                if value in seen:
                    raise ValueError(f"duplicate wrench {attr} {value!r}")
                seen.add(value)
        return v

    @pydantic.field_validator("program")
    @classmethod
    def _program_ids(cls, v: list[dict[str, Any]]) -> list[dict[str, Any]]:
        seen: set[str] = set()
        for i, table in enumerate(v):
            pid = table.get("id")
            if not isinstance(pid, str) or not re.match(_ID, pid):
                raise ValueError(f"program[{i}] needs an id of letters, digits, '_', '.', '-'")
            if pid in seen:
                raise ValueError(f"duplicate program id {pid!r}")
            seen.add(pid)
        return v

    @property
    def client_id(self) -> str:
        """The MQTT client id: configured, else derived from the station id (stable, so a
        persistent session finds its queue again after a restart)."""
        return self.broker.client_id or f"clampd-{self.station.id}"


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class LoadedConfig:
    """A validated configuration, where it came from and the warnings found."""

    config: StationConfig
    path: Path | None
    warnings: tuple[str, ...]


# -- environment overrides ------------------------------------------------------------------


def apply_env_overrides(data: dict[str, Any], env: Mapping[str, str]) -> list[str]:
    """Apply ``CLAMPD__A__B=value`` overrides to ``data`` in place; return the paths set.

    Values stay strings; validation converts them ("60" to 60, "true" to True). Raises
    ``ConfigError`` when a variable indexes past the end of an array or into a scalar.
    """
    applied: list[str] = []
    problems: list[ConfigProblem] = []
    for name in sorted(env):
        if not name.startswith(ENV_PREFIX):
            continue
        parts = [p.lower() for p in name[len(ENV_PREFIX) :].split("__")]
        if not all(parts):
            problems.append(ConfigProblem(path=name, message="empty part in variable name"))
            continue
        node: Any = data
        path = ""
        ok = True
        for i, part in enumerate(parts):
            last = i == len(parts) - 1
            if isinstance(node, list):
                if not part.isdigit() or int(part) >= len(node):
                    problems.append(
                        ConfigProblem(
                            path=name, message=f"{path or part}: no array element {part!r}"
                        )
                    )
                    ok = False
                    break
                path += f"[{part}]"
                if last:
                    node[int(part)] = env[name]
                else:
                    node = node[int(part)]
            elif isinstance(node, dict):
                path += f".{part}" if path else part
                if last:
                    node[part] = env[name]
                else:
                    node = node.setdefault(part, {})
            else:
                problems.append(ConfigProblem(path=name, message=f"{path} is a value, not a table"))
                ok = False
                break
        if ok:
            applied.append(path)
    if problems:
        raise ConfigError(problems, "environment")
    return applied


# -- validation -----------------------------------------------------------------------------


def _loc_path(loc: tuple[int | str, ...]) -> str:
    out = ""
    for part in loc:
        if isinstance(part, int):
            out += f"[{part}]"
        else:
            out += f".{part}" if out else str(part)
    return out


def _problems_from(exc: pydantic.ValidationError) -> list[ConfigProblem]:
    problems = []
    for err in exc.errors():
        message = str(err["msg"]).removeprefix("Value error, ")
        if err["type"] == "extra_forbidden":
            message = "unknown key (check the spelling)"
        elif err["type"] == "missing":
            message = "required key is missing"
        problems.append(ConfigProblem(path=_loc_path(tuple(err["loc"])), message=message))
    return problems


def _check_programs(config: StationConfig) -> list[ConfigProblem]:
    # The engine owns the program format; its problems carry paths inside one table.
    from clampd.daemon.engine import ProgramError, program_from_mapping

    problems = []
    for i, table in enumerate(config.program):
        try:
            program_from_mapping(table)
        except ProgramError as exc:
            for path, message in exc.problems:
                inner = path.removeprefix("program").lstrip(".")
                where = f"program[{i}].{inner}" if inner else f"program[{i}]"
                problems.append(ConfigProblem(path=where, message=message))
    return problems


def sensor_profile(profile: str) -> DeclarativeProfile | None:
    """The declarative sensor profile a wrench's ``profile`` names; None for "v1".

    A name ending in ".toml" is a file, any other name one of the shipped profiles.
    ``ProfileError`` when it cannot be loaded: the station file's (or the profile author's)
    fault. ``parse_config`` has loaded every configured one already, so after a successful
    load this raises only if the file changed since.
    """
    if profile == "v1":
        return None
    if profile.endswith(".toml"):
        return load_profile(Path(profile))
    return load_builtin_profile(profile)


def _check_profiles(config: StationConfig, check_files: bool) -> list[ConfigProblem]:
    # A profile that cannot be loaded would otherwise surface only when the daemon builds
    # the wrench's worker, as a crash after the file was declared fine.
    problems = []
    for i, w in enumerate(config.wrench):
        if not check_files and w.profile.endswith(".toml"):
            continue  # a file that may exist only on the station board
        try:
            sensor_profile(w.profile)
        except ProfileError as exc:
            for path, message in exc.problems:
                where = f" ({path})" if path else ""
                problems.append(
                    ConfigProblem(
                        path=f"wrench[{i}].profile",
                        message=f"{w.profile!r}{where}: {message} (or 'v1', the clampd profile)",
                    )
                )
    return problems


def _resolve_paths(data: dict[str, Any], base_dir: Path) -> None:
    """Make file paths in the raw data relative to the config file's directory."""

    def fix(section: Any, key: str) -> None:
        if isinstance(section, dict) and isinstance(section.get(key), str):
            p = Path(section[key]).expanduser()
            section[key] = str(p if p.is_absolute() else base_dir / p)

    broker = data.get("broker")
    for key in ("password_file", "tls_ca", "tls_cert", "tls_key"):
        fix(broker, key)
    fix(data.get("cues"), "wav_dir")
    fix(data.get("outbox"), "path")
    wrenches = data.get("wrench")
    for table in wrenches if isinstance(wrenches, list) else []:
        if isinstance(table, dict) and str(table.get("profile", "")).endswith(".toml"):
            fix(table, "profile")


def _check_files(config: StationConfig) -> list[ConfigProblem]:
    problems = []
    b = config.broker
    for key in ("password_file", "tls_ca", "tls_cert", "tls_key"):
        p: Path | None = getattr(b, key)
        if p is not None and not p.is_file():
            problems.append(ConfigProblem(path=f"broker.{key}", message=f"no such file: {p}"))
    return problems


def _exposure(p: Path, service_group: str) -> str | None:
    """Who besides the owner can reach a secret file, or None when nobody should worry.

    Group read is accepted only for the dedicated service group (deploy/BOARD.md installs
    secrets as root:clampd 0640 so the unprivileged daemon can read them); any other group,
    and anyone else, is a leak.
    """
    try:
        st = p.stat()
    except OSError:
        return None
    if st.st_mode & stat.S_IRWXO:
        return "others"
    if st.st_mode & (stat.S_IWGRP | stat.S_IXGRP):
        return "its group (write)"
    if st.st_mode & stat.S_IRGRP:
        try:
            group = grp.getgrgid(st.st_gid).gr_name
        except KeyError:
            group = str(st.st_gid)
        if group != service_group:
            return f"group {group!r}"
    return None


def _warnings(
    config: StationConfig,
    path: Path | None,
    today: dt.date,
    *,
    file_has_password: bool,
    service_group: str,
) -> list[str]:
    warnings: list[str] = []
    b = config.broker
    if path is not None and file_has_password:
        who = _exposure(path, service_group)
        if who is not None:
            warnings.append(
                f"{path} holds broker.password and is readable by {who}: chmod 600 it "
                f"(or 640 with group {service_group}), or move the secret to password_file"
            )
    for key in ("password_file", "tls_key"):
        p: Path | None = getattr(b, key)
        who = None if p is None else _exposure(p, service_group)
        if who is not None:
            warnings.append(
                f"broker.{key} {p} is readable by {who}: chmod 600 it "
                f"(or 640 with group {service_group})"
            )
    if b.tls and b.tls_ca is None:
        warnings.append("broker.tls_ca is not set: the system CA store will verify the broker")
    levels = config.station.topic_prefix.split("/")
    if levels[-1] != config.station.id:
        warnings.append(
            f"station.topic_prefix {config.station.topic_prefix!r} does not end with the "
            f"station id {config.station.id!r}; broker ACLs keyed on the id will refuse it"
        )
    if config.view.enabled and not _is_loopback(config.view.bind):
        warnings.append(
            f"view.bind {config.view.bind}: the station view (read-only, no log-in) is "
            "reachable from the network; bind 127.0.0.1 unless that network may see it"
        )
    if config.cues.output == "wav":
        warnings.append("cues.output = 'wav': cues are written to files, nobody hears them")
    for i, w in enumerate(config.wrench):
        if w.calibration_due is None:
            warnings.append(f"wrench[{i}] {w.id}: no calibration_due date recorded")
            continue
        state = calibration_state(w.calibration_due, today)
        if state is CalibrationState.OVERDUE:
            action = "it will be blocked" if w.block_when_calibration_overdue else "not blocked"
            warnings.append(
                f"wrench[{i}] {w.id}: calibration overdue since {w.calibration_due} ({action})"
            )
        elif state is CalibrationState.DUE_SOON:
            warnings.append(f"wrench[{i}] {w.id}: calibration due on {w.calibration_due}")
    return warnings


def parse_config(
    text: str,
    *,
    env: Mapping[str, str] | None = None,
    base_dir: Path | None = None,
    source: str = "<text>",
    config_path: Path | None = None,
    today: dt.date | None = None,
    check_files: bool = True,
    service_group: str = SERVICE_GROUP,
) -> LoadedConfig:
    """Validate TOML ``text`` (with environment overrides) into a ``LoadedConfig``.

    ``env`` defaults to ``os.environ``; pass ``{}`` to ignore it. Relative file paths are
    taken relative to ``base_dir`` (default: the working directory). ``check_files=False``
    skips the existence checks of referenced files (validating a board's config on a
    workstation). ``service_group`` may read secret files without a warning. Raises
    ``ConfigError`` with every problem found.
    """
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(
            [ConfigProblem(path="", message=f"not valid TOML: {exc}")], source
        ) from None
    except RecursionError:
        # tomllib reads nested arrays and inline tables recursively: a file nested some
        # thousands deep exhausts the stack instead of raising TOMLDecodeError.
        raise ConfigError(
            [ConfigProblem(path="", message="not valid TOML: nested too deeply")], source
        ) from None
    broker_raw = data.get("broker")
    file_has_password = isinstance(broker_raw, dict) and "password" in broker_raw
    apply_env_overrides(data, os.environ if env is None else env)
    _resolve_paths(data, base_dir or Path.cwd())
    try:
        config = StationConfig.model_validate(data)
    except pydantic.ValidationError as exc:
        raise ConfigError(_problems_from(exc), source) from None
    problems = (
        (_check_files(config) if check_files else [])
        + _check_programs(config)
        + _check_profiles(config, check_files)
    )
    if problems:
        raise ConfigError(problems, source)
    warnings = _warnings(
        config,
        config_path,
        today or dt.date.today(),
        file_has_password=file_has_password,
        service_group=service_group,
    )
    return LoadedConfig(config=config, path=config_path, warnings=tuple(warnings))


def load_config(
    path: str | os.PathLike[str],
    *,
    env: Mapping[str, str] | None = None,
    today: dt.date | None = None,
    check_files: bool = True,
    service_group: str = SERVICE_GROUP,
) -> LoadedConfig:
    """Read and validate the station file at ``path`` (see ``parse_config``).

    An unreadable file is a ``ConfigError`` too, so callers handle one error type.
    """
    p = Path(path)
    try:
        text = p.read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as exc:
        raise ConfigError([ConfigProblem(path="", message=f"cannot read: {exc}")], str(p)) from None
    return parse_config(
        text,
        env=env,
        base_dir=p.resolve().parent,
        source=str(p),
        config_path=p,
        today=today,
        check_files=check_files,
        service_group=service_group,
    )
