"""Socket reads sized below the daemon's mapping threshold (daemon/socket_reads.py)."""

from __future__ import annotations

import asyncio
import ctypes
import os
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


# A loopback exchange of 300 short lines under the daemon's allocator setting; the child
# prints its minor page faults while the server side reads them.
FAULTS_CHILD = """
import asyncio, resource, sys
from mailweir.daemon.socket_reads import read_from_heap
from mailweir.store.memory import map_large_blocks
map_large_blocks()

def faults():
    return resource.getrusage(resource.RUSAGE_SELF).ru_minflt

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
    for _ in range(20):  # settle the heap first
        writer.write(b"NOOP\\r\\n")
        await got.get()
    before = faults()
    for _ in range(300):  # one line, one read: each waits for the last
        writer.write(b"RCPT TO:<maren.okafor@harbourlane.example>\\r\\n")
        await got.get()
    print(faults() - before)
    writer.close()
    server.close()

asyncio.run(main())
"""


def _faults(mode: str) -> int:
    environment = {k: v for k, v in os.environ.items() if k != "MALLOC_MMAP_THRESHOLD_"}
    out = subprocess.run(
        [sys.executable, "-c", FAULTS_CHILD, mode],
        capture_output=True,
        text=True,
        timeout=60,
        env=environment,
        check=True,
    )
    return int(out.stdout)


def _glibc() -> bool:
    try:
        ctypes.CDLL(None).mallopt  # noqa: B018 - glibc only
    except (OSError, AttributeError):
        return False
    return True


@pytest.mark.slow
@pytest.mark.skipif(not _glibc(), reason="glibc's malloc only")
def test_capped_reads_stop_a_fresh_mapping_for_every_read() -> None:
    # With asyncio's 256 KiB reads every read maps fresh pages, and touching them faults;
    # capped, the reads reuse the heap.
    assert _faults("sized") < 60 < 300 <= _faults("asyncio")
