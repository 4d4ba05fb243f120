"""bench/bench_instructions.py's daemon wrapper: it must still find what it stretches, and
with --without-judging the judging step it replaces.

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


def _wrapper(without_judging: bool = False) -> tuple[str, int, int]:
    """The wrapper's code, its slowdown and the verdict batch it sets."""
    sys.path.insert(0, str(BENCH))
    try:
        import bench_instructions
    finally:
        sys.path.remove(str(BENCH))
    module = bench_instructions
    code = module.daemon_script(without_judging)
    return code, int(module.SLOWDOWN), int(module.VERDICT_BATCH)


def _before_start(code: str) -> str:
    """The wrapper's code up to where it starts the daemon."""
    patches, _, _ = code.rpartition('sys.argv[0] = "mailweir"')
    return patches


def test_the_wrapper_stretches_the_memory_return_and_sizes_the_verdict_batches() -> None:
    code, slowdown, verdict_batch = _wrapper()
    probe = _before_start(code) + (
        "print(memory_return.ReturnFreeMemory(lambda: 0)._every)\n"
        "print(verdict_log.VerdictLog(None, 0.5)._batch_size)\n"
    )
    out = subprocess.run([sys.executable, "-c", probe], capture_output=True, text=True, check=True)
    every, batch = out.stdout.split()
    assert float(every) == RETURN_EVERY * slowdown and int(batch) == verdict_batch


def test_the_wrapper_starts_the_command_line() -> None:
    for without_judging in (False, True):
        code, _, _ = _wrapper(without_judging)
        out = subprocess.run(
            [sys.executable, "-c", code, "--help"], capture_output=True, text=True, check=True
        )
        assert "run" in out.stdout


def test_without_judging_the_judge_returns_the_fixed_verdict() -> None:
    """--without-judging (here and in bench_relay.py) measures the daemon minus judging only
    while the patch replaces the judging step; a renamed step would leave it judging."""
    code, _, _ = _wrapper(without_judging=True)
    probe = _before_start(code) + (
        "import asyncio\n"
        "verdict = asyncio.run(judge.Judge._judge(None, 't1', b'x' * 4096, None, None))\n"
        "print(judge.Judge._judge.__name__, verdict.band, len(verdict.token_hashes))\n"
    )
    out = subprocess.run([sys.executable, "-c", probe], capture_output=True, text=True, check=True)
    assert out.stdout.split() == ["fixed_verdict", "ham", str(4096 // 20)]


def test_without_judging_refuses_a_judging_step_of_another_shape() -> None:
    """Called with the wrong arguments, the fixed verdict would fail every message into the
    "failed" band, which the benches would then measure without a word."""
    code, _, _ = _wrapper(without_judging=True)
    probe = (
        "from mailweir.daemon import judge\n"
        "async def _judge(self, tracking_id, raw, policy): ...\n"
        "judge.Judge._judge = _judge\n"
    ) + _before_start(code)
    out = subprocess.run([sys.executable, "-c", probe], capture_output=True, text=True)
    assert out.returncode != 0 and "Judge._judge changed" in out.stderr
