"""Who gets one more SMTP connection: the total cap, a cap per client, and reserved slots.

A flood of idle connections must not keep the organisation's own mail server out.  Three rules,
checked when a client connects (before the greeting):

- at most ``smtp.max_connections`` connections in all;
- clients outside ``smtp.reserved_networks`` share what is left after
  ``smtp.reserved_connections`` slots are set aside, so outsiders can never fill the cap;
- each outside client holds at most ``smtp.max_connections_per_client`` of them.  An IPv4
  client is one address; an IPv6 client is its /64, since one host usually holds a whole /64
  (common practice, no source).

Clients in the reserved networks (the upstream mail server) have no per-client cap: their
concurrency is set where they run (Postfix: the process limit in master.cf).
"""

from __future__ import annotations

import ipaddress
import logging
from collections import Counter
from collections.abc import Iterable

from mailweir.daemon import replies
from mailweir.daemon.replies import Reply
from mailweir.daemon.settings import SmtpSettings
from mailweir.daemon.site_policy import IpAddress, Networks, client_address

log = logging.getLogger("mailweir.smtp")

UNKNOWN_CLIENT = "unknown"  # a peer without an IP address counts as one outside client


def client_key(host: str | None) -> str:
    """The identity the per-client cap counts: the address, or an IPv6 address's /64."""
    return _key(client_address(host))


def _key(address: IpAddress | None) -> str:
    if address is None:
        return UNKNOWN_CLIENT
    if isinstance(address, ipaddress.IPv6Address):
        return str(ipaddress.IPv6Network((address, 64), strict=False))
    return str(address)


class Admission:
    """Counts open connections of outside clients and decides whether one more is served."""

    def __init__(
        self,
        limit: int,
        *,
        per_client: int | None = None,
        reserved_networks: Iterable[str] = (),
        reserved_connections: int = 0,
    ) -> None:
        self.limit = limit
        self.per_client = per_client  # None: no cap per client
        self.reserved_networks = Networks("smtp.reserved_networks", reserved_networks)
        self.outside_limit = max(limit - reserved_connections, 0)
        self.by_client: Counter[str] = Counter()  # open connections per outside client
        self.refused: Counter[str] = Counter()  # refusals by enhanced code, since start
        self.first_command_timeouts = 0  # connections closed for silence after the greeting

    @classmethod
    def from_settings(cls, smtp: SmtpSettings) -> Admission:
        return cls(
            smtp.max_connections,
            per_client=smtp.max_connections_per_client,
            reserved_networks=smtp.reserved_networks,
            reserved_connections=smtp.reserved_connections,
        )

    @property
    def outside(self) -> int:
        return self.by_client.total()

    def admit(self, host: str | None, open_now: int) -> Reply | None:
        """Count one more connection from ``host`` and return None, or return the refusal.

        ``open_now``: the connections open before this one.  Every admitted connection is
        given back with :meth:`release` and the same ``host``."""
        key = self._outside_key(host)
        if open_now >= self.limit:
            return self._refuse(host, replies.TOO_MANY_CONNECTIONS)
        if key is None:
            return None
        if self.per_client is not None and self.by_client[key] >= self.per_client:
            return self._refuse(host, replies.TOO_MANY_FROM_CLIENT)
        if self.outside >= self.outside_limit:
            return self._refuse(host, replies.TOO_MANY_CONNECTIONS)
        self.by_client[key] += 1
        return None

    def _refuse(self, host: str | None, reply: Reply) -> Reply:
        # A flood would write a line per connection: the first refusal and every 1,000th.
        self.refused[reply.enhanced] += 1
        count = self.refused.total()
        if count == 1 or count % 1000 == 0:
            log.warning("connection from %s refused: %s (%d refused so far)", host, reply, count)
        return reply

    def release(self, host: str | None) -> None:
        key = self._outside_key(host)
        if key is None:
            return
        self.by_client[key] -= 1
        if self.by_client[key] <= 0:
            del self.by_client[key]

    def _outside_key(self, host: str | None) -> str | None:
        """None for a client in the reserved networks, else its :func:`client_key`."""
        address = client_address(host)
        if self.reserved_networks.find(address) is not None:
            return None
        return _key(address)
