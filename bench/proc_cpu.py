"""CPU time from /proc (Linux): a process tree's own time, and the whole machine's busy time.

A process tree is a process and its live descendants (mailweir's scoring pool workers and
forkserver count as the daemon's).  Times are seconds of CPU, user plus system.
"""

from __future__ import annotations

import os
from collections.abc import Callable
from pathlib import Path

TICK = os.sysconf("SC_CLK_TCK")


def _stat_fields(pid: int) -> list[str] | None:
    try:
        text = Path(f"/proc/{pid}/stat").read_text()
    except OSError:  # gone
        return None
    # The command name may hold spaces and parentheses; the fields start after the last ")".
    return text[text.rindex(")") + 2 :].split()


def _children() -> dict[int, list[int]]:
    tree: dict[int, list[int]] = {}
    for entry in os.scandir("/proc"):
        if entry.name.isdigit():
            fields = _stat_fields(int(entry.name))
            if fields is not None:
                tree.setdefault(int(fields[1]), []).append(int(entry.name))
    return tree


def tree_pids(root: int) -> list[int]:
    """``root`` and its live descendants."""
    tree = _children()
    pids, todo = [], [root]
    while todo:
        pid = todo.pop()
        pids.append(pid)
        todo.extend(tree.get(pid, ()))
    return pids


def parent_pid(pid: int) -> int | None:
    """*pid*'s parent, None if *pid* is not a live process here."""
    fields = _stat_fields(pid)
    return None if fields is None else int(fields[1])


def process_seconds(pid: int) -> float:
    """CPU seconds used so far by one process (all its threads), 0 when it is gone."""
    fields = _stat_fields(pid)
    return 0.0 if fields is None else (int(fields[11]) + int(fields[12])) / TICK


def system_seconds(pid: int) -> float:
    """The kernel's share of ``process_seconds``: system calls and page faults."""
    fields = _stat_fields(pid)
    return 0.0 if fields is None else int(fields[12]) / TICK


def minor_faults(pid: int) -> float:
    """Page faults so far that read nothing from disk (a fresh page touched, mostly)."""
    fields = _stat_fields(pid)
    return 0.0 if fields is None else float(fields[7])


def tree_counts(root: int, count: Callable[[int], float]) -> dict[int, float]:
    """``count`` of each process of the tree; diff two snapshots with :func:`used`."""
    return {pid: count(pid) for pid in tree_pids(root)}


def tree_seconds(root: int) -> dict[int, float]:
    """CPU seconds per process of the tree; diff two snapshots with :func:`used`."""
    return tree_counts(root, process_seconds)


def used(before: dict[int, float], after: dict[int, float]) -> float:
    """CPU seconds (or counts) between two snapshots (a process born in between counts from
    zero)."""
    return sum(seconds - before.get(pid, 0.0) for pid, seconds in after.items())


def machine_busy_seconds() -> float:
    """Busy CPU seconds of the whole machine since boot, summed over every core."""
    with open("/proc/stat") as stat:
        fields = [int(x) for x in stat.readline().split()[1:]]
    user, nice, system, _idle, _iowait, irq, softirq, steal = fields[:8]
    return (user + nice + system + irq + softirq + steal) / TICK


def rss_bytes(pid: int) -> int:
    """Resident set size of one process (VmRSS), 0 when it is gone."""
    return _kib_field(f"/proc/{pid}/status", "VmRSS:")


def peak_rss_bytes(pid: int) -> int:
    """The largest resident set size of one process since it started or since its peak was
    reset (VmHWM; Linux resets it when ``5`` is written to ``/proc/<pid>/clear_refs``), 0
    when it is gone."""
    return _kib_field(f"/proc/{pid}/status", "VmHWM:")


def pss_bytes(pid: int) -> int:
    """Proportional set size of one process (Pss in smaps_rollup), 0 when it is gone.

    Pages shared between processes count in shares, so summing over a process tree counts
    each page once; summed RSS counts a page the forkserver preloaded once per worker."""
    return _kib_field(f"/proc/{pid}/smaps_rollup", "Pss:")


def pss_file_bytes(pid: int) -> int:
    """The part of ``pss_bytes`` that maps files (Pss_File): shared libraries, and pages of
    the SQLite model that its memory map has touched, which the kernel can drop and read
    again, unlike the process's own (anonymous) memory."""
    return _kib_field(f"/proc/{pid}/smaps_rollup", "Pss_File:")


def _kib_field(path: str, key: str) -> int:
    """Bytes of the first "<key> <n> kB" line of a /proc file, 0 when it is gone."""
    try:
        for line in Path(path).read_text().splitlines():
            if line.startswith(key):
                return int(line.split()[1]) * 1024
    except OSError:
        pass
    return 0
