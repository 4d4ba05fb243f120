"""Socket reads sized below the daemon's mapping threshold (daemon/socket_reads.py)."""

from __future__ import annotations

import asyncio
import subprocess
import sys

import aiosmtplib
import pytest
from smtp_helpers import LOCAL, daemon_settings, message, running_daemon

from mailweir.daemon.smtp_server import FilterSMTP
from mailweir.daemon.socket_reads import READ_BYTES, read_from_heap
from mailweir.store.memory import DAEMON_MMAP_THRESHOLD

pytestmark = pytest.mark.timeout(60)


def test_a_full_read_fits_below_the_mapping_threshold() -> None:
    # A bytes object of READ_BYTES is its data, its header and glibc's chunk header.
    assert sys.getsizeof(b"\0" * READ_BYTES) + 16 < DAEMON_MMAP_THRESHOLD


async def test_read_from_heap_caps_a_socket_transport_and_leaves_others_alone() -> None:
    server = await asyncio.start_server(lambda reader, writer: writer.close(), LOCAL, 0)
    try:
        _, writer = await asyncio.open_connection(LOCAL, server.sockets[0].getsockname()[1])
        transport = writer.transport
        assert transport.max_size > READ_BYTES  # type: ignore[attr-defined]  # asyncio's 256 KiB
        read_from_heap(transport)
        assert transport.max_size == READ_BYTES  # type: ignore[attr-defined]
        writer.close()
        await writer.wait_closed()
    finally:
        server.close()
        await server.wait_closed()
    read_from_heap(None)  # nothing to size: no error
    read_from_heap(asyncio.BaseTransport())


async def test_upstream_and_next_hop_reads_are_capped_and_large_mail_arrives_whole(next_hop):
    # Large enough to take several reads at each hop.
    raw = message(b"".join(b"Kennel rota line %06d for the weekend.\r\n" % i for i in range(6000)))
    assert len(raw) > 3 * READ_BYTES
    async with running_daemon(daemon_settings(next_hop.address)) as daemon:
        client = aiosmtplib.SMTP(hostname=LOCAL, port=daemon.port, start_tls=False)
        await client.connect()
        await client.ehlo()
        await client.mail("orders@vetsupply.example")
        await client.rcpt("maren.okafor@harbourlane.example")
        (upstream,) = daemon.connections.protocols
        assert isinstance(upstream, FilterSMTP)
        assert upstream.transport.max_size == READ_BYTES  # type: ignore[union-attr]
        relay = upstream.session.relay  # type: ignore[union-attr]
        next_hop_client = relay._client  # the kept aiosmtplib client (not public)
        assert next_hop_client.transport.max_size == READ_BYTES
        answer = await client.data(raw)
        await client.quit()
    assert answer.code == 250
    assert [d.content for d in next_hop.deliveries] == [raw]


# A loopback exchange of 300 short lines; the child prints the largest block Python asked for
# while the server side read one (tracemalloc's peak above what was held before the read).
# Faults and mappings would show the same, but only while glibc has no free heap space to
# serve the block from, which a fresh interpreter compiling its modules may leave it.
READS_CHILD = """
import asyncio, sys, tracemalloc
from mailweir.daemon.socket_reads import read_from_heap

async def main():
    got = asyncio.Queue()
    class Lines(asyncio.Protocol):
        def connection_made(self, transport):
            if sys.argv[1] == "sized":
                read_from_heap(transport)
        def data_received(self, data):
            got.put_nowait(data)
    loop = asyncio.get_running_loop()
    server = await loop.create_server(Lines, "127.0.0.1", 0)
    _, writer = await asyncio.open_connection("127.0.0.1", server.sockets[0].getsockname()[1])
    largest = 0
    tracemalloc.start()
    for _ in range(300):  # one line, one read: each waits for the last
        tracemalloc.reset_peak()
        held = tracemalloc.get_traced_memory()[0]
        writer.write(b"RCPT TO:<maren.okafor@harbourlane.example>\\r\\n")
        await got.get()
        largest = max(largest, tracemalloc.get_traced_memory()[1] - held)
    tracemalloc.stop()
    print(largest)
    writer.close()
    server.close()

asyncio.run(main())
"""


def _largest_block(mode: str) -> int:
    out = subprocess.run(
        [sys.executable, "-c", READS_CHILD, mode],
        capture_output=True,
        text=True,
        timeout=60,
        check=True,
    )
    return int(out.stdout)


@pytest.mark.slow
def test_capped_reads_ask_for_blocks_below_the_mapping_threshold() -> None:
    # asyncio asks for 256 KiB a read (so the daemon's allocator maps and unmaps a block for
    # each, with its page faults: bench/bench_relay.py); capped, each read's block is below.
    assert (
        _largest_block("sized") < DAEMON_MMAP_THRESHOLD <= 256 * 1024 <= _largest_block("asyncio")
    )
