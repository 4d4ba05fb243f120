"""Site policy: sender allow and block lists, exempt role mailboxes, per-recipient cut-offs.

Pure matching, no I/O: :class:`SitePolicy` is built once from ``[policy]`` (at start and on
each reload; a bad entry raises :class:`ConfigError` naming its key) and then answered per
message.

Address patterns, for the sender lists and ``[[policy.recipient]]`` alike:

- ``local@domain``: that address;
- ``@domain``: every address of that domain, and of no other;
- ``@.domain``: that domain and every subdomain below it, at any depth.

Addresses compare case-insensitively, the local part included: RFC 5321 section 2.4 lets the
receiving host treat local parts as case-sensitive but discourages relying on it, and mail
systems of small organisations do not (common practice, no source).

Networks are CIDR texts matched against the SMTP client's address (IPv4-mapped IPv6 as IPv4).

Both lists matching: the block list wins.  An envelope sender is a claim anyone can write,
while the client address comes from the TCP connection; if allow won, a sender on the allow
list could be forged from a blocked network.  Block winning also keeps "allow the domain,
block one account" expressible; "block the domain, allow one address" is not (ask the mail
server to exempt that address instead).
"""

from __future__ import annotations

import dataclasses
import ipaddress
from collections.abc import Iterable
from dataclasses import dataclass
from typing import Literal

from mailweir.daemon.errors import ConfigError
from mailweir.daemon.settings import PolicySettings, RecipientPolicy

IpAddress = ipaddress.IPv4Address | ipaddress.IPv6Address
ListName = Literal["allow", "block"]

PATTERN_FORMS = '"local@domain", "@domain" or "@.domain" (the domain and its subdomains)'


@dataclass(frozen=True)
class ListHit:
    """Which list decided, by which key and entry (as the admin wrote it)."""

    list: ListName
    key: str
    entry: str

    def __str__(self) -> str:
        return f"{self.key} {self.entry}"


def split_address(address: str | None) -> tuple[str, str]:
    """(local part, domain), lower case; ``<>`` and a trailing root dot dropped.

    An address without ``@`` is all local part (``RCPT TO:<Postmaster>``, RFC 5321 4.5.1).
    """
    text = (address or "").strip().strip("<>").strip().lower()
    local, at, domain = text.rpartition("@")
    if not at:
        return text, ""
    return local, domain.rstrip(".")


def client_address(peer: object) -> IpAddress | None:
    """The client's IP address from aiosmtpd's ``session.peer`` (a tuple, or a bare host)."""
    host = peer[0] if isinstance(peer, tuple) and peer else peer
    if not isinstance(host, str):
        return None  # a Unix socket, or no peer at all
    try:
        address = ipaddress.ip_address(host.split("%", 1)[0])
    except ValueError:
        return None
    if isinstance(address, ipaddress.IPv6Address) and address.ipv4_mapped is not None:
        return address.ipv4_mapped
    return address


class AddressPatterns:
    """A set of address patterns, found in O(labels of the domain) per address."""

    def __init__(self, key: str, entries: Iterable[str]) -> None:
        self.addresses: dict[str, str] = {}  # "local@domain" -> entry as written
        self.domains: dict[str, str] = {}  # "domain" -> entry
        self.trees: dict[str, str] = {}  # "domain" -> entry, for the domain and below
        for entry in entries:
            self.add(key, entry)

    def add(self, key: str, entry: str) -> None:
        text = entry.strip().lower()
        local, at, domain = text.partition("@")
        tree = domain.startswith(".")
        domain = domain.removeprefix(".").rstrip(".")
        labels = domain.split(".")
        if not at or "@" in domain or not all(labels) or any(c.isspace() for c in text):
            raise ConfigError(key, f"got {entry!r}; expected {PATTERN_FORMS}")
        if local and tree:
            raise ConfigError(key, f"got {entry!r}; a subdomain pattern has no local part")
        table = self.addresses if local else self.trees if tree else self.domains
        name = f"{local}@{domain}" if local else domain
        if name in table:
            raise ConfigError(key, f"lists {entry!r} twice")
        table[name] = entry

    def __bool__(self) -> bool:
        return bool(self.addresses or self.domains or self.trees)

    def find(self, address: str | None) -> str | None:
        """The most specific entry matching ``address``: the address, its domain, then the
        nearest enclosing ``@.domain``; None when nothing matches (and for ``<>``)."""
        local, domain = split_address(address)
        if not domain:
            return None
        entry = self.addresses.get(f"{local}@{domain}") or self.domains.get(domain)
        if entry is not None or not self.trees:
            return entry
        labels = domain.split(".")
        for start in range(len(labels)):
            entry = self.trees.get(".".join(labels[start:]))
            if entry is not None:
                return entry
        return None


class Networks:
    """CIDR networks, found by one dictionary probe per distinct prefix length (longest
    first, so the most specific entry is reported), not by a scan of every entry."""

    def __init__(self, key: str, entries: Iterable[str]) -> None:
        # (IP version, prefix length) -> {network number >> host bits: entry as written}
        self._tables: dict[tuple[int, int], dict[int, str]] = {}
        for entry in entries:
            try:
                network = ipaddress.ip_network(entry)
            except ValueError as exc:
                raise ConfigError(
                    key,
                    f"got {entry!r} ({exc}); expected networks in CIDR form such as "
                    '"192.0.2.0/24" or "2001:db8::/32"',
                ) from exc
            host_bits = network.max_prefixlen - network.prefixlen
            table = self._tables.setdefault((network.version, network.prefixlen), {})
            table.setdefault(int(network.network_address) >> host_bits, entry)
        self._tables = dict(sorted(self._tables.items(), key=lambda item: -item[0][1]))

    def __bool__(self) -> bool:
        return bool(self._tables)

    def find(self, address: IpAddress | None) -> str | None:
        if address is None:
            return None
        for (version, length), table in self._tables.items():
            if version == address.version:
                entry = table.get(int(address) >> (address.max_prefixlen - length))
                if entry is not None:
                    return entry
        return None


@dataclass(frozen=True)
class RecipientView:
    """The policy that applies to one recipient, and whether it is an exempt role mailbox."""

    policy: PolicySettings
    exempt: bool
    rule: str = ""  # the [[policy.recipient]] match that applied; "" for the [policy] one


class SitePolicy:
    """``[policy]``'s lists and per-recipient rules, parsed once."""

    def __init__(self, policy: PolicySettings) -> None:
        self.policy = policy
        self.allow_senders = AddressPatterns("policy.allow_senders", policy.allow_senders)
        self.block_senders = AddressPatterns("policy.block_senders", policy.block_senders)
        self.allow_networks = Networks("policy.allow_networks", policy.allow_networks)
        self.block_networks = Networks("policy.block_networks", policy.block_networks)
        self.exempt = frozenset(_exempt_parts(policy.exempt_local_parts))
        self.rules = AddressPatterns("policy.recipient", ())
        self._views: dict[str, RecipientView] = {}
        for index, rule in enumerate(policy.recipient):
            where = f"policy.recipient[{index}]"
            self.rules.add(f"{where}.match", rule.match)
            self._views[rule.match] = RecipientView(_merged(policy, rule, where), False, rule.match)
        self._default = RecipientView(policy, False)

    @property
    def has_lists(self) -> bool:
        return bool(
            self.allow_senders or self.block_senders or self.allow_networks or self.block_networks
        )

    def sender_hit(self, sender: str | None, peer: object) -> ListHit | None:
        """The list that decides this envelope, block before allow; None: score it."""
        if not self.has_lists:
            return None
        client = client_address(peer)
        for name, senders, networks in (
            ("block", self.block_senders, self.block_networks),
            ("allow", self.allow_senders, self.allow_networks),
        ):
            entry = senders.find(sender)
            if entry is not None:
                return ListHit(name, f"policy.{name}_senders", entry)  # type: ignore[arg-type]
            entry = networks.find(client)
            if entry is not None:
                return ListHit(name, f"policy.{name}_networks", entry)  # type: ignore[arg-type]
        return None

    def is_exempt(self, recipient: str) -> bool:
        local, _ = split_address(recipient)
        return local in self.exempt

    def recipient_view(self, recipient: str) -> RecipientView:
        """The policy for ``recipient``: its ``[[policy.recipient]]`` rule, else ``[policy]``."""
        match = self.rules.find(recipient) if self.rules else None
        view = self._default if match is None else self._views[match]
        if self.is_exempt(recipient):
            return dataclasses.replace(view, exempt=True)
        return view


def _exempt_parts(parts: Iterable[str]) -> Iterable[str]:
    for part in parts:
        text = part.strip().lower()
        if not text or "@" in text or any(c.isspace() for c in text):
            raise ConfigError(
                "policy.exempt_local_parts",
                f'got {part!r}; expected local parts without a domain, such as "postmaster"',
            )
        yield text


def _merged(policy: PolicySettings, rule: RecipientPolicy, where: str) -> PolicySettings:
    """``policy`` with the rule's values in place of the ones it sets."""
    values = {
        name: getattr(rule, name)
        for name in ("suspect_threshold", "spam_threshold", "suspect_action", "spam_action")
        if getattr(rule, name) is not None
    }
    merged = dataclasses.replace(policy, **values)
    for name in ("suspect_threshold", "spam_threshold"):
        value = getattr(merged, name)
        if not 0.0 <= value <= 1.0:
            raise ConfigError(f"{where}.{name}", f"got {value!r}; expected a number from 0 to 1")
    if merged.suspect_threshold > merged.spam_threshold:
        raise ConfigError(
            f"{where}.suspect_threshold",
            f"is {merged.suspect_threshold!r} with spam_threshold {merged.spam_threshold!r} "
            f"for {rule.match!r}; expected at most the spam threshold",
        )
    for name in ("suspect_action", "spam_action"):
        problem = action_problem(getattr(merged, name), policy)
        if problem is not None:
            raise ConfigError(f"{where}.{name}", problem)
    return merged


def action_problem(action: str, policy: PolicySettings) -> str | None:
    """Why ``action`` cannot be configured beside ``policy``'s mailbox and position, or None
    (for ``[policy]``'s actions and each ``[[policy.recipient]]`` rule's alike)."""
    if action == "reroute" and not policy.quarantine_mailbox:
        return 'is "reroute"; expected policy.quarantine_mailbox to be set'
    if action == "reject" and policy.position != "before-queue":
        return (
            f'is "reject" with policy.position = {policy.position!r}; expected '
            '"before-queue" (behind the queue a refusal bounces mail already accepted)'
        )
    return None


_last: tuple[PolicySettings, SitePolicy] | None = None


def compiled(policy: PolicySettings) -> SitePolicy:
    """The :class:`SitePolicy` of ``policy``, parsed once per settings object.

    A reload swaps in a new ``PolicySettings``; the first message after it parses the new one,
    every other message reuses it (keyed by identity: one comparison per message).
    """
    global _last
    last = _last
    if last is not None and last[0] is policy:
        return last[1]
    site = SitePolicy(policy)
    _last = (policy, site)
    return site
