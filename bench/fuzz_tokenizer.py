"""Coverage-guided fuzzing of the tokenizer with atheris, run by hand.

    pip install atheris
    python bench/fuzz_tokenizer.py -atheris_runs=200000           # libFuzzer flags pass through
    python bench/fuzz_tokenizer.py -max_total_time=600 corpus_dir/  # grow your own corpus

Seeds come from tests/reliability/hostile/*.eml and tests/daemon/malformed/*.eml.  Each input
is tokenized; a crash is any exception escaping ``tokens`` (its contract is "never raises"),
the "mime:failed" marker (an exception it caught), more than ``max_tokens`` tokens, or one
call taking more than MEMORY_BOUND of Python allocations (tracemalloc, every SAMPLE_EVERY-th
input, since tracing slows everything down).  The slowest input seen is reported at exit.

atheris needs a CPython it has wheels or a compiler for; where it does not install, the
hypothesis tests in tests/reliability/test_hostile.py still run.
"""

from __future__ import annotations

import atexit
import shutil
import sys
import tempfile
import time
import tracemalloc
from pathlib import Path

try:
    import atheris
except ImportError:  # pragma: no cover - by-hand tool
    sys.exit("atheris is not installed: pip install atheris (CPython 3.8-3.12 wheels)")

with atheris.instrument_imports():
    from mailweir.model.tokenize import DEFAULT_OPTIONS, tokens

ROOT = Path(__file__).resolve().parents[1]
SEEDS = [ROOT / "tests" / "reliability" / "hostile", ROOT / "tests" / "daemon" / "malformed"]
MEMORY_BOUND = 64 * 1024 * 1024
SAMPLE_EVERY = 100
SLOWEST = Path(tempfile.gettempdir()) / "mailweir-fuzz-slowest.eml"  # to time it untraced
_state = {"runs": 0, "slowest": 0.0, "slowest_size": 0}


def check(data: bytes) -> None:
    _state["runs"] += 1
    traced = _state["runs"] % SAMPLE_EVERY == 0
    if traced:
        tracemalloc.start()
    started = time.perf_counter()
    found = tokens(data)
    seconds = time.perf_counter() - started
    if traced:
        peak = tracemalloc.get_traced_memory()[1]
        tracemalloc.stop()
        if peak > MEMORY_BOUND:
            raise AssertionError(f"{peak} bytes allocated for a {len(data)}-byte input")
    if seconds > _state["slowest"]:
        _state["slowest"], _state["slowest_size"] = seconds, len(data)
        if _state["runs"] > 1000:  # past the seeds; libFuzzer may exit without atexit
            SLOWEST.write_bytes(data)
            report()
    if "mime:failed" in found:
        raise AssertionError("the tokenizer caught an exception (mime:failed)")
    if len(found) > DEFAULT_OPTIONS.max_tokens or not all(found):
        raise AssertionError(f"{len(found)} tokens, or an empty one")


def report() -> None:
    print(
        f"\nfuzz_tokenizer: {_state['runs']} inputs so far; "
        f"slowest {_state['slowest'] * 1000:.1f} ms "
        f"({_state['slowest_size']} bytes, kept in {SLOWEST})",
        file=sys.stderr,
    )


def corpus_args(argv: list[str]) -> list[str]:
    """The libFuzzer arguments, plus a scratch corpus folder seeded from ours unless a corpus
    folder was given (libFuzzer writes new inputs into the first one: never the tree's)."""
    if any(not arg.startswith("-") for arg in argv[1:]):
        return argv
    scratch = Path(tempfile.mkdtemp(prefix="mailweir-fuzz-"))
    for folder in SEEDS:
        for path in folder.glob("*.eml"):
            shutil.copy(path, scratch / f"{folder.name}-{path.name}")
    print(f"fuzz_tokenizer: corpus in {scratch}", file=sys.stderr)
    return [*argv, str(scratch)]


if __name__ == "__main__":
    atexit.register(report)
    atheris.Setup(corpus_args(sys.argv), check)
    atheris.Fuzz()
