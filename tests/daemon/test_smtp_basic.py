"""End-to-end: smtplib -> mailweir -> aiosmtpd sink, the plain path."""

from __future__ import annotations

import pytest
from smtp_helpers import daemon_settings, message, running_daemon, send

pytestmark = pytest.mark.timeout(30)


async def test_relay_passes_ham_byte_exact(next_hop):
    raw = message()
    async with running_daemon(daemon_settings(next_hop.address)) as daemon:
        sent = await send(daemon.port, raw)
    assert sent.data is not None and sent.data[0] == 250
    assert [d.content for d in next_hop.deliveries] == [raw]
