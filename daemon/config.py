"""Configuration: TOML file, then ``MAILWEIR_*`` environment variables, then command-line flags.

Each layer overrides the one before it, on top of the defaults in ``settings.py``.  Every key
is written as ``section.key`` (``policy.spam_threshold``) or, at the top level, ``key``
(``state_dir``); its environment variable is ``MAILWEIR_`` plus the key in upper case with the
dot as ``_`` (``MAILWEIR_POLICY_SPAM_THRESHOLD``, ``MAILWEIR_STATE_DIR``).

Validation happens once, before anything binds, and fails with :class:`ConfigError` naming the
key, the value, where it came from and what was expected.  Unknown keys are errors: a typo must
never fall back silently to a default.
"""

from __future__ import annotations

import dataclasses
import os
import tomllib
import types
import typing
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Literal

from mailweir.daemon.errors import ConfigError
from mailweir.daemon.settings import (
    FeedbackSettings,
    HostPort,
    PolicySettings,
    QuarantineSettings,
    RecipientPolicy,
    Settings,
    SmtpSettings,
)
from mailweir.daemon.site_policy import Networks, SitePolicy, action_problem

ENV_PREFIX = "MAILWEIR_"
CONFIG_PATH_ENV = "MAILWEIR_CONFIG"  # the file to read when --config is not given
LOG_LEVELS = ("debug", "info", "warning", "error", "critical")

# Section name -> settings dataclass, from the fields of Settings that are dataclasses.
SECTIONS: dict[str, type] = {
    f.name: f.default_factory  # type: ignore[misc]
    for f in dataclasses.fields(Settings)
    if f.default_factory is not dataclasses.MISSING
}


@dataclass(frozen=True)
class ConfigSource:
    """Where settings come from; kept by the service so SIGHUP can read them again."""

    path: Path | None = None
    env: Mapping[str, str] = field(default_factory=lambda: dict(os.environ))
    flags: Mapping[str, str] = field(default_factory=dict)  # dotted key -> text, from the CLI
    flag_names: Mapping[str, str] = field(default_factory=dict)  # dotted key -> "--flag"

    def load(self) -> Settings:
        return load_settings(self.path, self.env, self.flags, self.flag_names)


def load_settings(
    path: Path | None = None,
    env: Mapping[str, str] | None = None,
    flags: Mapping[str, str] | None = None,
    flag_names: Mapping[str, str] | None = None,
) -> Settings:
    """Build validated settings from a TOML file, the environment and flags (in that order)."""
    values: dict[str, tuple[Any, str]] = {}  # dotted key -> (raw value, where it came from)
    if path is not None:
        values.update(_read_file(Path(path)))
    values.update(_read_env(os.environ if env is None else env))
    for key, text in (flags or {}).items():
        values[key] = (text, f"command-line flag {(flag_names or {}).get(key, key)}")
    settings = _build(values, os.environ if env is None else env)
    try:
        validate(settings)
    except ConfigError as exc:
        if exc.key not in values:
            raise
        origin = values[exc.key][1]
        raise ConfigError(exc.key, f"{exc.reason} (from {origin})") from exc.__cause__
    return settings


def find_problems(
    path: Path | None = None,
    env: Mapping[str, str] | None = None,
    flags: Mapping[str, str] | None = None,
    limit: int = 100,
) -> list[ConfigError]:
    """Every problem of a configuration, not just the first (``mailweir check``).

    Loads as :func:`load_settings` does; after each problem the key at fault is dropped (it
    falls back to its default) and loading starts again.  A problem whose key cannot be dropped
    (an unreadable file, a key missing from a pair) ends the search.
    """
    env = os.environ if env is None else env
    try:
        values = _read_file(Path(path)) if path is not None else {}
    except ConfigError as exc:
        return [exc]
    values.update(_read_env(env))
    for key, text in (flags or {}).items():
        values[key] = (text, f"command-line flag for {key}")
    problems: list[ConfigError] = []
    while len(problems) < limit:
        try:
            validate(_build(values, env))
            break
        except ConfigError as exc:
            problem = exc
            if exc.key in values and "(from " not in exc.reason:
                problem = ConfigError(exc.key, f"{exc.reason} (from {values[exc.key][1]})")
            problems.append(problem)
            if values.pop(exc.key, None) is None:
                break
    return problems


def env_name(key: str) -> str:
    """The environment variable that overrides a dotted key."""
    return ENV_PREFIX + key.replace(".", "_").upper()


def default_state_dir(env: Mapping[str, str]) -> Path:
    """Where state lives when nobody says: systemd's StateDirectory, else by who we run as.

    Root (a packaged service) gets ``/var/lib/mailweir``; anyone else gets their XDG state
    directory, so ``mailweir run`` with no file at all works for an ordinary user.
    """
    if env.get("STATE_DIRECTORY"):
        return Path(env["STATE_DIRECTORY"].split(":")[0])
    if os.geteuid() == 0:
        return Settings().state_dir
    base = env.get("XDG_STATE_HOME") or str(Path.home() / ".local" / "state")
    return Path(base) / "mailweir"


# -- reading the layers ------------------------------------------------------------------


def _read_file(path: Path) -> dict[str, tuple[Any, str]]:
    try:
        with path.open("rb") as handle:
            document = tomllib.load(handle)
    except FileNotFoundError as exc:
        raise ConfigError("--config", f"file {str(path)!r} does not exist") from exc
    except OSError as exc:
        raise ConfigError("--config", f"cannot read {str(path)!r}: {exc.strerror}") from exc
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError("--config", f"{str(path)!r} is not valid TOML: {exc}") from exc
    origin = f"file {path}"
    values: dict[str, tuple[Any, str]] = {}
    for name, value in document.items():
        if name in SECTIONS:
            if not isinstance(value, dict):
                raise ConfigError(name, f"in {origin} must be a table [{name}], got {value!r}")
            for key, item in value.items():
                values[f"{name}.{key}"] = (item, origin)
        else:
            values[name] = (value, origin)
    return values


def _read_env(env: Mapping[str, str]) -> dict[str, tuple[Any, str]]:
    """Pick up ``MAILWEIR_<SECTION>_<KEY>`` and ``MAILWEIR_<TOP_LEVEL_KEY>`` variables.

    A variable naming a known section but an unknown key is kept so that validation rejects
    it; other ``MAILWEIR_*`` names (``MAILWEIR_CONFIG``, test settings) are not ours to judge.
    """
    top_level = {f.name for f in dataclasses.fields(Settings) if f.name not in SECTIONS}
    values: dict[str, tuple[Any, str]] = {}
    # Longest section names first so NEXT_HOP_ is not read as a key of some "next" section.
    prefixes = sorted(SECTIONS, key=len, reverse=True)
    for name, text in env.items():
        if not name.startswith(ENV_PREFIX) or name == CONFIG_PATH_ENV:
            continue
        rest = name[len(ENV_PREFIX) :].lower()
        origin = f"environment {name}"
        if rest in top_level:
            values[rest] = (text, origin)
            continue
        for section in prefixes:
            if rest.startswith(section + "_"):
                values[f"{section}.{rest[len(section) + 1 :]}"] = (text, origin)
                break
    return values


# -- turning values into settings --------------------------------------------------------


def _build(values: Mapping[str, tuple[Any, str]], env: Mapping[str, str]) -> Settings:
    sections: dict[str, dict[str, Any]] = {name: {} for name in SECTIONS}
    top: dict[str, Any] = {}
    top_hints = typing.get_type_hints(Settings)
    for key, (raw, origin) in values.items():
        section, _, name = key.rpartition(".")
        if not section:
            if key not in top_hints or key in SECTIONS:
                raise ConfigError(key, f"unknown key (from {origin}); known: {_known(None)}")
            top[key] = _coerce(key, raw, top_hints[key], origin)
            continue
        if section not in SECTIONS:
            raise ConfigError(key, f"unknown section [{section}] (from {origin})")
        hints = typing.get_type_hints(SECTIONS[section])
        if name not in hints:
            raise ConfigError(key, f"unknown key (from {origin}); known: {_known(section)}")
        sections[section][name] = _coerce(key, raw, hints[name], origin)
    if "state_dir" not in top:
        top["state_dir"] = default_state_dir(env)
    built = {name: SECTIONS[name](**fields) for name, fields in sections.items()}
    return Settings(**top, **built)


def _known(section: str | None) -> str:
    if section is None:
        names = [f.name for f in dataclasses.fields(Settings) if f.name not in SECTIONS]
        return ", ".join(names + [f"[{name}]" for name in SECTIONS])
    return ", ".join(f.name for f in dataclasses.fields(SECTIONS[section]))


def _coerce(key: str, raw: Any, hint: Any, origin: str) -> Any:
    """Turn a TOML value or a text (environment, flag) into the field's type."""
    text = isinstance(raw, str)

    def bad(expected: str) -> ConfigError:
        return ConfigError(key, f"got {raw!r} (from {origin}); expected {expected}")

    args = typing.get_args(hint)
    if typing.get_origin(hint) in (typing.Union, types.UnionType) and type(None) in args:
        if raw == "":  # the one way to say "none" in TOML and in the environment alike
            return None
        (hint,) = [a for a in args if a is not type(None)]
        args = typing.get_args(hint)  # of what is left: an optional Literal's choices
    if typing.get_origin(hint) is Literal:
        if raw not in args:
            raise bad("one of " + ", ".join(repr(a) for a in args))
        return raw
    if hint is bool:
        if isinstance(raw, bool):
            return raw
        if text and raw.lower() in ("true", "false", "1", "0", "yes", "no", "on", "off"):
            return raw.lower() in ("true", "1", "yes", "on")
        raise bad("true or false")
    if hint is int:
        if isinstance(raw, int) and not isinstance(raw, bool):
            return raw
        if text:
            try:
                return int(raw.replace("_", ""))
            except ValueError:
                pass
        raise bad("a whole number")
    if hint is float:
        if isinstance(raw, int | float) and not isinstance(raw, bool):
            return float(raw)
        if text:
            try:
                return float(raw)
            except ValueError:
                pass
        raise bad("a number")
    if hint is str:
        if text:
            return raw
        raise bad("a string")
    if hint is Path:
        if text and raw:
            return Path(raw)
        raise bad("a non-empty path")
    if hint == tuple[str, ...]:
        # A TOML array of strings, or one text of comma-separated items (environment, flags).
        if text:
            return tuple(item.strip() for item in raw.split(",") if item.strip())
        if isinstance(raw, list) and all(isinstance(item, str) for item in raw):
            return tuple(raw)
        raise bad("a list of strings")
    if hint == tuple[RecipientPolicy, ...]:
        if isinstance(raw, list) and all(isinstance(item, dict) for item in raw):
            return tuple(_recipient_rule(f"{key}[{i}]", item, origin) for i, item in enumerate(raw))
        raise bad("[[policy.recipient]] tables in the configuration file")
    if hint is HostPort:
        if text:
            try:
                return parse_host_port(raw)
            except ValueError:
                pass
        raise bad('"host:port" (IPv6 as "[addr]:port")')
    raise bad(f"a value of type {hint}")  # a settings field type this loader does not know


def _recipient_rule(key: str, table: dict[str, Any], origin: str) -> RecipientPolicy:
    """One ``[[policy.recipient]]`` table, each value coerced like a key of its own."""
    hints = typing.get_type_hints(RecipientPolicy)
    values = {}
    for name, raw in table.items():
        if name not in hints:
            known = ", ".join(hints)
            raise ConfigError(f"{key}.{name}", f"unknown key (from {origin}); known: {known}")
        values[name] = _coerce(f"{key}.{name}", raw, hints[name], origin)
    if not values.get("match"):
        raise ConfigError(f"{key}.match", f"is missing (from {origin}); expected an address")
    return RecipientPolicy(**values)


def parse_host_port(text: str) -> HostPort:
    """Parse ``host:port`` or ``[ipv6]:port``; the range check is left to :func:`validate`."""
    host, sep, port = text.strip().rpartition(":")
    if not sep or not host or not port.isdigit():
        raise ValueError(text)
    if host.startswith("[") and host.endswith("]"):
        host = host[1:-1]
    elif ":" in host:
        raise ValueError(text)  # a bare IPv6 address is ambiguous without brackets
    if not host:
        raise ValueError(text)
    return HostPort(host, int(port))


# -- validation --------------------------------------------------------------------------


def validate(settings: Settings) -> None:
    """Check ranges and combinations; raise :class:`ConfigError` on the first problem."""
    for key, value, low, high, expected in _ranges(settings):
        if not (low <= value <= high):
            raise ConfigError(key, f"got {value!r}; expected {expected}")
    for key, address, low in (
        ("smtp.listen", settings.smtp.listen, 0),  # 0 asks the OS for a free port (tests)
        ("http.listen", settings.http.listen, 0),
        ("next_hop.address", settings.next_hop.address, 1),
    ):
        if not (low <= address.port <= 65535):
            raise ConfigError(key, f"got port {address.port}; expected {low}..65535")
    _check_policy(settings.policy)
    _check_tls(settings)
    _check_admission(settings.smtp)
    if settings.log.level.lower() not in LOG_LEVELS:
        raise ConfigError("log.level", f"got {settings.log.level!r}; expected one of {LOG_LEVELS}")
    _check_method(settings.model.method)
    _check_feedback(settings.feedback)
    _check_quarantine(settings.quarantine)


def _ranges(s: Settings) -> list[tuple[str, float, float, float, str]]:
    inf = float("inf")
    return [
        ("smtp.max_message_bytes", s.smtp.max_message_bytes, 1, inf, "at least 1"),
        ("smtp.max_recipients", s.smtp.max_recipients, 1, inf, "at least 1"),
        ("smtp.max_connections", s.smtp.max_connections, 1, inf, "at least 1"),
        ("smtp.max_connections_per_client", s.smtp.max_connections_per_client, 1, inf, ">= 1"),
        ("smtp.reserved_connections", s.smtp.reserved_connections, 0, inf, "0 or more"),
        ("smtp.command_timeout", s.smtp.command_timeout, 1e-3, inf, "seconds > 0"),
        ("smtp.first_command_timeout", s.smtp.first_command_timeout, 1e-3, inf, "seconds > 0"),
        ("next_hop.connect_timeout", s.next_hop.connect_timeout, 1e-3, inf, "seconds > 0"),
        ("next_hop.command_timeout", s.next_hop.command_timeout, 1e-3, inf, "seconds > 0"),
        ("next_hop.data_timeout", s.next_hop.data_timeout, 1e-3, inf, "seconds > 0"),
        ("policy.suspect_threshold", s.policy.suspect_threshold, 0.0, 1.0, "a number from 0 to 1"),
        ("policy.spam_threshold", s.policy.spam_threshold, 0.0, 1.0, "a number from 0 to 1"),
        ("policy.min_trained", s.policy.min_trained, 0, inf, "0 or more messages"),
        ("model.cache_tokens", s.model.cache_tokens, 0, inf, "0 or more tokens"),
        ("model.staleness_seconds", s.model.staleness_seconds, 0.0, inf, "0 or more seconds"),
        ("model.scoring_workers", s.model.scoring_workers, 1, 256, "1..256 workers"),
        ("model.max_concurrent_scoring", s.model.max_concurrent_scoring, 1, inf, "at least 1"),
        ("log.verdict_retention_days", s.log.verdict_retention_days, 0, inf, "0 or more days"),
        ("log.verdict_batch_seconds", s.log.verdict_batch_seconds, 1e-3, 3600, "0 < s <= 3600"),
        ("feedback.rate_limit_per_hour", s.feedback.rate_limit_per_hour, 0, inf, "0 or more"),
        ("feedback.max_message_bytes", s.feedback.max_message_bytes, 1, inf, "at least 1"),
        ("quarantine.retention_days", s.quarantine.retention_days, 1, inf, "1 or more"),
        ("upkeep.prune_every_hours", s.upkeep.prune_every_hours, 0, inf, "hours, 0: off"),
        ("upkeep.prune_max_count", s.upkeep.prune_max_count, 1, inf, "1 or more messages"),
        ("upkeep.prune_unseen_days", s.upkeep.prune_unseen_days, 1, inf, "1 or more days"),
        ("upkeep.trim_every_hours", s.upkeep.trim_every_hours, 0, inf, "hours, 0: off"),
        ("upkeep.verdict_keep_days", s.upkeep.verdict_keep_days, 1, inf, "1 or more days"),
        ("upkeep.tidy_every_hours", s.upkeep.tidy_every_hours, 0, inf, "hours, 0: off"),
    ]


def _check_policy(policy: PolicySettings) -> None:
    if policy.suspect_threshold > policy.spam_threshold:
        raise ConfigError(
            "policy.suspect_threshold",
            f"got {policy.suspect_threshold!r}; expected at most policy.spam_threshold "
            f"({policy.spam_threshold!r})",
        )
    if policy.ham_action in ("reroute", "reject"):
        raise ConfigError("policy.ham_action", f"got {policy.ham_action!r}; expected pass or tag")
    for name in ("suspect_action", "spam_action", "block_action"):
        problem = action_problem(getattr(policy, name), policy)
        if problem is not None:
            raise ConfigError(f"policy.{name}", problem)
    mailbox = policy.quarantine_mailbox
    if mailbox and not _is_address(mailbox):
        raise ConfigError(
            "policy.quarantine_mailbox", f"got {mailbox!r}; expected an address local@domain"
        )
    SitePolicy(policy)  # parses every list entry and [[policy.recipient]] rule, naming the key


def _check_tls(settings: Settings) -> None:
    cert, key = settings.smtp.tls_cert, settings.smtp.tls_key
    if (cert is None) != (key is None):
        missing = "smtp.tls_key" if key is None else "smtp.tls_cert"
        given = "smtp.tls_cert" if key is None else "smtp.tls_key"
        raise ConfigError(missing, f"is not set but {given} is; expected both or neither")
    for name, path in (("smtp.tls_cert", cert), ("smtp.tls_key", key)):
        if path is not None and not path.is_file():
            raise ConfigError(name, f"got {str(path)!r}; expected a readable file")


def _check_admission(smtp: SmtpSettings) -> None:
    if smtp.reserved_connections > smtp.max_connections:
        raise ConfigError(
            "smtp.reserved_connections",
            f"got {smtp.reserved_connections!r}; expected at most smtp.max_connections "
            f"({smtp.max_connections!r})",
        )
    _check_networks("smtp.reserved_networks", smtp.reserved_networks)
    _check_networks("smtp.xforward_networks", smtp.xforward_networks)


def _check_networks(key: str, networks: tuple[str, ...]) -> None:
    Networks(key, networks)  # raises ConfigError naming the key and the bad entry


def _check_method(method: str) -> None:
    from mailweir.model.nb import make_scorer  # late: keeps config loading light

    try:
        make_scorer(method)
    except (KeyError, ValueError) as exc:
        raise ConfigError("model.method", f"got {method!r}; {exc}") from exc


def _check_feedback(feedback: FeedbackSettings) -> None:
    for name in ("spam_address", "ham_address"):
        address = getattr(feedback, name)
        if address and (address.count("@") != 1 or address[0] == "@" or address[-1] == "@"):
            raise ConfigError(f"feedback.{name}", f"got {address!r}; expected local@domain")
    if feedback.spam_address and feedback.spam_address.lower() == feedback.ham_address.lower():
        raise ConfigError(
            "feedback.ham_address",
            f"got {feedback.ham_address!r}, the same as feedback.spam_address; "
            "expected two different addresses",
        )
    _check_networks("feedback.trusted_networks", feedback.trusted_networks)


def _is_address(text: str) -> bool:
    """Whether ``text`` has the local@domain shape (one "@", something either side)."""
    return text.count("@") == 1 and not text.startswith("@") and not text.endswith("@")


def _check_quarantine(quarantine: QuarantineSettings) -> None:
    for name in ("digest_admin", "digest_from"):
        address = getattr(quarantine, name)
        if address and not _is_address(address):
            raise ConfigError(f"quarantine.{name}", f"got {address!r}; expected local@domain")
    if not quarantine.digest_time:
        return
    if digest_clock(quarantine.digest_time) is None:
        raise ConfigError(
            "quarantine.digest_time",
            f'got {quarantine.digest_time!r}; expected "HH:MM" (24-hour clock), or "" for none',
        )
    if not quarantine.digest_from:
        raise ConfigError(
            "quarantine.digest_from",
            "is not set but quarantine.digest_time is; expected an address",
        )
    if quarantine.digest_to == "admin" and not quarantine.digest_admin:
        raise ConfigError(
            "quarantine.digest_admin", 'is not set but quarantine.digest_to is "admin"'
        )


def digest_clock(text: str) -> tuple[int, int] | None:
    """(hour, minute) of an "HH:MM" text, or None when it is not a time of day."""
    hour, colon, minute = text.strip().partition(":")
    if not (colon and hour.isdigit() and minute.isdigit() and len(minute) == 2):
        return None
    if int(hour) > 23 or int(minute) > 59:
        return None
    return int(hour), int(minute)
