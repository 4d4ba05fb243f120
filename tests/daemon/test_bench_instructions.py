"""bench/bench_instructions.py's daemon wrapper: it must still find what it stretches.

The wrapper patches the daemon's clock-driven work by name (the free-memory return's interval,
the verdict log's batch size); a rename in the daemon would otherwise leave the instruction
counts silently inflated by work that lands a hundred times as often per message.
"""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

from mailweir.daemon.memory_return import RETURN_EVERY

BENCH = Path(__file__).resolve().parents[2] / "bench"


def _wrapper() -> tuple[str, int, int]:
    """The wrapper's code, its slowdown and the verdict batch it sets."""
    sys.path.insert(0, str(BENCH))
    try:
        import bench_instructions
    finally:
        sys.path.remove(str(BENCH))
    module = bench_instructions
    return str(module._SLOW_DAEMON), int(module.SLOWDOWN), int(module.VERDICT_BATCH)


def test_the_wrapper_stretches_the_memory_return_and_sizes_the_verdict_batches() -> None:
    code, slowdown, verdict_batch = _wrapper()
    patches, _, _ = code.rpartition('sys.argv[0] = "mailweir"')  # everything but the start
    probe = patches + (
        "print(memory_return.ReturnFreeMemory(lambda: 0)._every)\n"
        "print(verdict_log.VerdictLog(None, 0.5)._batch_size)\n"
    )
    out = subprocess.run([sys.executable, "-c", probe], capture_output=True, text=True, check=True)
    every, batch = out.stdout.split()
    assert float(every) == RETURN_EVERY * slowdown and int(batch) == verdict_batch


def test_the_wrapper_starts_the_command_line() -> None:
    code, _, _ = _wrapper()
    out = subprocess.run(
        [sys.executable, "-c", code, "--help"], capture_output=True, text=True, check=True
    )
    assert "run" in out.stdout
