"""Socket reads sized to come from the heap, not from a mapping of their own.

asyncio's socket transport reads with ``sock.recv(max_size)``, and ``max_size`` is 256 KiB:
Python makes a bytes object of that size, reads into it and shrinks it to what came.  The
daemon gives every block of ``DAEMON_MMAP_THRESHOLD`` (64 KiB) or more a mapping of its own
(``store/memory.py``, ``map_large_blocks``), so each read of an SMTP command or reply became a
``mmap``, a ``mremap`` and a ``munmap``, with the page faults of touching fresh pages.
glibc serves such a block from free heap space when it has some, so the cost came and went
with the heap's state.  4 KB mail at 8 clients, nine rounds in which the bare relay, the daemon
before this cap and with it took turns (README, "The kernel's share"): 16.2 against 0.3 minor
faults and 0.41 against 0.19 ms of system CPU a message (the bare relay 0.18), 1.87 against
1.56 times the bare relay's CPU, the same PSS.  A 100 KB message now arrives in two reads or
more instead of one or two.
"""

from __future__ import annotations

import asyncio
from typing import Final

from mailweir.store.memory import DAEMON_MMAP_THRESHOLD

# Room below the threshold for the bytes object's header and glibc's chunk header.
READ_BYTES: Final = DAEMON_MMAP_THRESHOLD - 4096


def read_from_heap(transport: asyncio.BaseTransport | None) -> None:
    """Cap the transport's reads at ``READ_BYTES``.  Only asyncio's socket transports read
    with ``recv(max_size)``; any other (TLS, another event loop) is left as it is."""
    size = getattr(transport, "max_size", None)
    if isinstance(size, int) and size > READ_BYTES:
        transport.max_size = READ_BYTES  # type: ignore[union-attr]
