"""The daemon's settings as typed values.

Every field here is a configuration key: the TOML table is the dataclass name's section
(``[smtp]``, ``[next_hop]``, ``[policy]``, ``[model]``, ``[http]``, ``[log]``, ``[feedback]``,
``[quarantine]``, ``[upkeep]``)
and the key is the field name.  Loading, environment overrides and validation live in ``config.py``.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from typing import Literal

Band = Literal["ham", "suspect", "spam"]
Action = Literal["pass", "tag", "reroute", "reject"]


@dataclass(frozen=True)
class HostPort:
    host: str
    port: int

    def __str__(self) -> str:
        return f"[{self.host}]:{self.port}" if ":" in self.host else f"{self.host}:{self.port}"


@dataclass(frozen=True)
class SmtpSettings:
    listen: HostPort = HostPort("127.0.0.1", 7125)
    hostname: str = ""  # empty: the machine's FQDN
    max_message_bytes: int = 64 * 1024 * 1024
    max_recipients: int = 1000
    max_connections: int = 200
    # Floods (daemon/admission.py): outside clients get max_connections - reserved_connections
    # slots, each at most max_connections_per_client; reserved networks are the mail server's.
    max_connections_per_client: int = 20
    reserved_networks: tuple[str, ...] = ("127.0.0.1/32", "::1/128")
    reserved_connections: int = 20
    # Clients whose XFORWARD (the upstream mail server's word on its own client) is believed;
    # empty: XFORWARD is neither offered nor accepted.
    xforward_networks: tuple[str, ...] = ("127.0.0.1/32", "::1/128")
    # RFC 5321 section 4.5.3.2 asks servers to wait at least 5 minutes for a command.
    command_timeout: float = 300.0
    # Before the first command a client has not started a dialogue yet: a silent connection
    # holds a slot for nothing, so it is closed (421 4.4.2) much sooner.
    first_command_timeout: float = 30.0
    tls_cert: Path | None = None
    tls_key: Path | None = None


@dataclass(frozen=True)
class NextHopSettings:
    address: HostPort = HostPort("127.0.0.1", 7126)
    connect_timeout: float = 30.0
    command_timeout: float = 60.0
    # RFC 5321 section 4.5.3.2: 10 minutes for the reply to the end of DATA.
    data_timeout: float = 600.0
    helo_name: str = ""  # empty: same as smtp.hostname
    send_xforward: bool = True  # tell a next hop that offers XFORWARD who the client was


@dataclass(frozen=True)
class RecipientPolicy:
    """One ``[[policy.recipient]]`` table; an unset value falls back to the ``[policy]`` one."""

    match: str  # "local@domain", "@domain" or "@.domain", as for the sender lists
    suspect_threshold: float | None = None
    spam_threshold: float | None = None
    suspect_action: Action | None = None
    spam_action: Action | None = None


@dataclass(frozen=True)
class PolicySettings:
    mode: Literal["observe", "enforce"] = "observe"
    position: Literal["after-queue", "before-queue"] = "after-queue"
    # From the replay of the Enron-Spam development corpus with the default model (online,
    # 1,000-message warm-up; bench/ACCURACY.md): at 0.98, 0.043% of ham was judged spam and
    # 24.5% of spam fell below; from 0.5, the suspect band took 93% of that spam (1.7% of all
    # spam left as ham) and 1.5% of ham.  `mailweir calibrate` redoes this on a site's own mail.
    suspect_threshold: float = 0.5
    spam_threshold: float = 0.98
    ham_action: Action = "pass"
    suspect_action: Action = "tag"
    spam_action: Action = "tag"
    subject_prefix: str = ""
    quarantine_mailbox: str = ""
    min_trained: int = 50  # messages per class before any verdict acts (cold-start guard)
    on_scoring_failure: Literal["pass", "tempfail"] = "pass"
    # Site policy (daemon/site_policy.py), checked before scoring.  Sender entries are
    # "local@domain", "@domain" (that domain) or "@.domain" (it and its subdomains); networks
    # are CIDR texts matched against the SMTP client.  Block wins when both lists match.
    allow_senders: tuple[str, ...] = ()
    allow_networks: tuple[str, ...] = ()
    block_senders: tuple[str, ...] = ()
    block_networks: tuple[str, ...] = ()
    block_action: Literal["tag", "reroute", "reject"] = "tag"
    # Role mailboxes of every domain (RFC 5321 section 4.5.1, RFC 2142): only ever tagged.
    exempt_local_parts: tuple[str, ...] = ("postmaster", "abuse")
    # [[policy.recipient]] tables: cut-offs and actions for one mailbox or domain.
    recipient: tuple[RecipientPolicy, ...] = ()


@dataclass(frozen=True)
class ModelSettings:
    database: str = ""  # URL or SQLite path; empty: <state_dir>/model.sqlite3
    method: str = "fisher"
    cache_tokens: int = 1_000_000
    preload: bool = True  # every token's counts in memory at start (daemon/preload.py)
    staleness_seconds: float = 5.0
    scoring_workers: int = 2
    # True: large messages are tokenized in worker processes; False (the default): in threads
    # of the daemon, which measured cheaper and leaner on a small machine (daemon/judge.py).
    tokenizer_processes: bool = False
    max_concurrent_scoring: int = 16


@dataclass(frozen=True)
class HttpSettings:
    listen: HostPort = HostPort("127.0.0.1", 7180)
    token: str = ""  # bearer token for POST endpoints; empty: those endpoints are closed


@dataclass(frozen=True)
class LogSettings:
    verdict_retention_days: int = 30
    verdict_batch_seconds: float = 0.5
    level: str = "info"
    format: Literal["text", "json"] = "text"


@dataclass(frozen=True)
class FeedbackSettings:
    # Mail to these addresses is a correction, consumed here and never relayed; empty: off.
    spam_address: str = ""  # "this should have been spam"
    ham_address: str = ""  # "this was wanted mail"
    # Only SMTP clients in these networks may train.  mailweir sees only its direct client:
    # behind a mail server that is the server, for mail from inside and outside alike, so the
    # server must refuse outside mail to the feedback addresses.  The SMTP side offers no
    # AUTH, so there is no authenticated submission to trust instead.
    trusted_networks: tuple[str, ...] = ("127.0.0.0/8", "::1/128")
    rate_limit_per_hour: int = 60  # corrections per envelope sender; 0: no limit
    max_message_bytes: int = 16 * 1024 * 1024


@dataclass(frozen=True)
class QuarantineSettings:
    # Held copies of rerouted mail live in <state_dir>/quarantine; this many days after being
    # held they are reported as due, and `mailweir held --expire` deletes them (never by itself).
    retention_days: int = 30
    # "HH:MM" (the daemon's local time): send the daily digest of held mail then; "": no digest.
    digest_time: str = ""
    # Who gets the digest: "recipients" (each original recipient, their own mail only) or
    # "admin" (one digest of everything to digest_admin).
    digest_to: Literal["recipients", "admin"] = "recipients"
    digest_admin: str = ""
    digest_from: str = ""  # the digest's sender address; required when digest_time is set


@dataclass(frozen=True)
class UpkeepSettings:
    # Hours between runs of each upkeep task inside the daemon; 0 switches that task off.
    # The last run is stamped in the database, so a restart does not reset the schedule.
    prune_every_hours: float = 24.0  # drop rare tokens not seen for a while
    prune_max_count: int = 1  # ... seen in at most this many trained messages
    prune_unseen_days: int = 60  # ... and in none for this many days
    trim_every_hours: float = 24.0  # delete verdict rows older than verdict_keep_days
    # Whole verdict rows (score, band, action; the rates and `mailweir calibrate` read them);
    # their token hashes go sooner, after log.verdict_retention_days.
    verdict_keep_days: int = 400
    tidy_every_hours: float = 6.0  # SQLite: WAL checkpoint and PRAGMA optimize


@dataclass(frozen=True)
class Settings:
    state_dir: Path = Path("/var/lib/mailweir")
    smtp: SmtpSettings = field(default_factory=SmtpSettings)
    next_hop: NextHopSettings = field(default_factory=NextHopSettings)
    policy: PolicySettings = field(default_factory=PolicySettings)
    model: ModelSettings = field(default_factory=ModelSettings)
    http: HttpSettings = field(default_factory=HttpSettings)
    log: LogSettings = field(default_factory=LogSettings)
    feedback: FeedbackSettings = field(default_factory=FeedbackSettings)
    quarantine: QuarantineSettings = field(default_factory=QuarantineSettings)
    upkeep: UpkeepSettings = field(default_factory=UpkeepSettings)

    @property
    def database(self) -> str:
        return self.model.database or str(self.state_dir / "model.sqlite3")
