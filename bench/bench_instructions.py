"""Instructions per message, counted by callgrind: figures that other load cannot move.

The time a message costs moves with the other tenants of the machine (up to 2x within minutes
here), so a change of a few per cent cannot be seen in one run of ``bench_relay.py``.
callgrind counts the instructions a process executes instead: two runs of the same code on
the same input agree to about 0.1% (the relay pair) and 0.2% (the scoring path, whose digest
cache follows the per-process hash seed), whatever else the machine does.  An
instruction is not a fixed time (a cache miss costs more than an add), so these counts sit
beside the CPU times of ``bench_relay.py``, never in place of them; and they count the
process's own (user-space) instructions only, not the kernel's work for its system calls.

Two measurements:

``relay`` (the default): the bare relay and the daemon of ``bench_relay.py`` (the same sink,
model of at least 500,000 tokens, configuration, messages and new words), each started under
callgrind with counting off.  The daemon first takes one unmeasured pass of the messages, each
server a warm-up of 50 messages with new words of their own; then counting is switched on
(``callgrind_control``), the measured messages are sent, counting is switched off, and the
counts are dumped: every thread of the server is in them (the judge's, the database's).
Prints instructions per message and the ratio.  The daemon's work by the clock is scaled to
callgrind's slowdown (``SLOWDOWN``): a new periodic task in the daemon needs the same here, or
it lands about a hundred times as often per message as at full speed.

``scoring``: the scoring path alone in this process, as ``bench_scoring.py`` measures it
(parse, tokenize, look up, score, name the evidence) over the same generated messages with
their new words: instructions per message, for comparing two versions of the model code.

    python bench/bench_instructions.py                    # about a minute
    python bench/bench_instructions.py scoring            # about 20 seconds
    python bench/bench_instructions.py --messages 400 --clients 1 8
    python bench/bench_instructions.py --keep /tmp/dumps   # then: callgrind_annotate FILE
    python bench/bench_instructions.py --cache-sim         # and last-level cache misses

Needs valgrind (Debian's package).  Everything listens on 127.0.0.1; counts are bounded.
"""

from __future__ import annotations

import argparse
import asyncio
import functools
import os
import re
import shutil
import subprocess
import sys
import tempfile
from collections.abc import Callable
from contextlib import ExitStack
from pathlib import Path
from typing import TypeVar

BENCH = Path(__file__).resolve().parent
sys.path.insert(0, str(BENCH))

import bench_mail  # noqa: E402
from bench_relay import (  # noqa: E402
    FIXED_VERDICT,
    PYTHON,
    RUN_DAEMON,
    _free_port,
    _mailweir_config,
    _start,
    _stop,
)
from relay_parts import LOCAL, push  # noqa: E402

from mailweir.model.tokenize import DEFAULT_OPTIONS  # noqa: E402

# A server under callgrind runs tens of times slower; imports and the model's preload too.
START_WAIT = 900.0
# The daemon's work that comes by the clock would land about SLOWDOWN times as often per
# message as at full speed: the count memory's freshness check (due every 5 s of wall time)
# and the return of free memory (every 5 s while mail comes) get intervals that much longer,
# and the verdict log, which writes its queue every 0.5 s (about 325 rows a batch at full
# speed, 2-5 under callgrind), writes every VERDICT_BATCH rows instead, so each window holds
# the same writes in every run.
SLOWDOWN = 100
VERDICT_BATCH = 100
_STRETCHED = f"""
from mailweir.daemon import memory_return, verdict_log

def stretched(init, **defaults):
    def __init__(self, *args, **kwargs):
        init(self, *args, **(defaults | kwargs))
    return __init__

memory_return.ReturnFreeMemory.__init__ = stretched(
    memory_return.ReturnFreeMemory.__init__, every=memory_return.RETURN_EVERY * {SLOWDOWN}
)
verdict_log.VerdictLog.__init__ = stretched(
    verdict_log.VerdictLog.__init__, batch_size={VERDICT_BATCH}
)
"""
T = TypeVar("T")


def daemon_script(without_judging: bool = False) -> str:
    """The code ``python -c`` runs as the daemon: its clock-driven work stretched, and with
    *without_judging* a fixed verdict in place of judging (bench_relay.py)."""
    return _STRETCHED + (FIXED_VERDICT if without_judging else "") + RUN_DAEMON


# A dump names its events, then gives their totals in that order ("summary:" there reads 0).
_EVENTS = re.compile(rb"^events: (.+)$", re.MULTILINE)
_TOTALS = re.compile(rb"^totals: (.+)$", re.MULTILINE)


def callgrind(out: Path, argv: list[str], cache_sim: bool = False) -> list[str]:
    """*argv* under callgrind, counting nothing until switched on; dumps go to ``out.<pid>.<n>``.
    With *cache_sim*, callgrind also simulates the caches (the last level sized as this
    machine's) and counts their misses."""
    return [
        "valgrind",
        "--tool=callgrind",
        "--instr-atstart=no",
        *(["--cache-sim=yes"] if cache_sim else []),
        f"--callgrind-out-file={out}.%p",
        *argv,
    ]


def _control(pid: int, *flags: str) -> None:
    subprocess.run(["callgrind_control", *flags, str(pid)], check=True, capture_output=True)


def counted(pid: int, out: Path, window: int, send: Callable[[], T]) -> tuple[dict[str, int], T]:
    """Run ``send()`` with counting on in process *pid*, its *window*-th measurement; return
    the events counted (``Ir``: instructions; with the cache simulation ``DLmr`` and ``DLmw``,
    last-level data read and write misses, and more) and what ``send`` returned."""
    _control(pid, "-i", "on")
    try:
        sent = send()
    finally:
        _control(pid, "-i", "off")
    _control(pid, "-d")  # written to out.<pid>.<window>, and the counts start again from zero
    dump = Path(f"{out}.{pid}.{window}")
    text = dump.read_bytes()
    events, totals = _EVENTS.search(text), _TOTALS.search(text)
    if events is None or totals is None:
        raise SystemExit(f"no totals in {dump}")
    names = events.group(1).decode().split()
    return dict(zip(names, map(int, totals.group(1).split()), strict=True)), sent


def _keep(folder: Path, keep: Path | None) -> None:
    """Copy the measured windows' dumps (``<name>.<pid>.<n>``) to *keep*."""
    if keep is None:
        return
    keep.mkdir(parents=True, exist_ok=True)
    for dump in folder.glob("*.*.*"):
        if dump.suffix[1:].isdigit():
            shutil.copy(dump, keep / dump.name)


def relay(args: argparse.Namespace) -> None:
    model = bench_mail.build_model(args.min_tokens, bigrams=args.bigrams)
    messages = [bench_mail.message(i, args.size, seed=7) for i in range(args.messages)]
    print(
        f"{args.messages} messages of {args.size // 1024} KB, {args.new_words} new words each; "
        "user-space instructions per message, counted by callgrind"
    )
    # --without-judging: the daemon with a fixed verdict in place of judging (bench_relay.py)
    name = "no-judge" if args.without_judging else "mailweir"
    misses = f" {'LL misses bare':>15} {name:>9}" if args.cache_sim else ""
    print(f"{'cli':>3} {'bare':>12} {name:>12} {'ratio':>7}{misses}")
    with tempfile.TemporaryDirectory(prefix="mailweir-bench-instr-") as tmp, ExitStack() as stop:
        folder = Path(tmp)
        here = [PYTHON, str(BENCH / "relay_parts.py")]
        sink, sink_port = _start([*here, "sink", str(folder / "sink")], folder / "sink")
        stop.callback(_stop, sink)
        bare_argv = [*here, "bare", f"{LOCAL}:{sink_port}", str(folder / "bare"), "--wire"]
        bare_argv = callgrind(folder / "bare", bare_argv, args.cache_sim)
        bare, bare_port = _start(bare_argv, folder / "bare", None)
        stop.callback(_stop, bare)
        port = _free_port()
        staleness = f"staleness_seconds = {5 * SLOWDOWN}\n"
        by_count = "verdict_batch_seconds = 3600\n"  # the verdict log writes by count (above)
        config = _mailweir_config(folder, model, sink_port, port, staleness, by_count)
        script = daemon_script(args.without_judging)
        daemon_argv = [PYTHON, "-c", script, "run", "--config", str(config)]
        daemon_argv = callgrind(folder / "mailweir", daemon_argv, args.cache_sim)
        daemon, _ = _start(daemon_argv, None, port, START_WAIT)
        stop.callback(_stop, daemon)
        asyncio.run(push(port, messages, 8))  # the count cache then holds their tokens
        servers = {"bare": (bare.pid, bare_port), "mailweir": (daemon.pid, port)}
        for window, clients in enumerate(args.clients, start=1):
            fresh = [
                bench_mail.with_new_words(raw, i, args.new_words, window)
                for i, raw in enumerate(messages)
            ]
            per_message: dict[str, dict[str, float]] = {}
            for name, (pid, server_port) in servers.items():
                # Warm-up with new words of their own: the first messages that bring new
                # words after the unmeasured pass cost more (about 60 thousand instructions a
                # message over 200), whichever window they fall in.
                warm = [
                    bench_mail.with_new_words(raw, i, args.new_words, 1000 + window)
                    for i, raw in enumerate(messages[:50])
                ]
                asyncio.run(push(server_port, warm, clients))
                send = functools.partial(asyncio.run, push(server_port, fresh, clients))
                totals, results = counted(pid, folder / name, window, send)
                if results.failures:
                    raise SystemExit(f"{name}: {len(results.failures)} messages refused")
                per_message[name] = {event: n / len(fresh) for event, n in totals.items()}
            bare, ours = per_message["bare"], per_message["mailweir"]
            line = f"{clients:>3} {bare['Ir']:>12,.0f} {ours['Ir']:>12,.0f}"
            line += f" {ours['Ir'] / bare['Ir']:>7.3f}"
            if args.cache_sim:
                line += f" {bare['DLmr'] + bare['DLmw']:>15,.0f}"
                line += f" {ours['DLmr'] + ours['DLmw']:>9,.0f}"
            print(line)
        _keep(folder, args.keep)


def scoring(args: argparse.Namespace) -> None:
    """Re-run this script under callgrind, measuring the scoring path in that process."""
    with tempfile.TemporaryDirectory(prefix="mailweir-bench-instr-") as tmp:
        out = Path(tmp) / "scoring"
        argv = [PYTHON, __file__, "scoring-child", "--messages", str(args.messages)]
        argv += ["--size", str(args.size), "--new-words", str(args.new_words)]
        argv += ["--min-tokens", str(args.min_tokens), "--out", str(out)]
        argv += ["--bigrams"] if args.bigrams else []
        child = subprocess.run(callgrind(out, argv), stderr=subprocess.PIPE)
        if child.returncode:
            sys.stderr.buffer.write(child.stderr)
            raise SystemExit(f"the measured process exited with {child.returncode}")
        _keep(Path(tmp), args.keep)


def scoring_child(args: argparse.Namespace) -> None:
    import bench_scoring

    from mailweir.daemon.learning import scorer_for
    from mailweir.store import ModelStore

    model = bench_mail.build_model(args.min_tokens, bigrams=args.bigrams)
    with tempfile.TemporaryDirectory(prefix="mailweir-bench-instr-") as tmp:
        path = Path(tmp) / "model.sqlite3"
        shutil.copyfile(model, path)
        store = ModelStore.open(str(path))
        if not store.preload():
            raise SystemExit("the model does not fit the count cache")
        options = bench_mail.BIGRAM_OPTIONS if args.bigrams else DEFAULT_OPTIONS
        scorer = scorer_for("fisher", options)  # uncapped for a bigram model, as the daemon
        messages = [bench_mail.message(i, args.size, seed=7) for i in range(args.messages)]
        for raw in messages:  # as in the relay: the digest and count caches hold their words
            bench_scoring._whole_path(store, scorer, raw, options)
        fresh = [
            bench_mail.with_new_words(raw, i, args.new_words, 1) for i, raw in enumerate(messages)
        ]

        def send() -> None:
            for raw in fresh:
                bench_scoring._whole_path(store, scorer, raw, options)

        totals, _ = counted(os.getpid(), args.out, 1, send)
        store.close()
    print(
        f"scoring path, {args.messages} messages of {args.size // 1024} KB, "
        f"{args.new_words} new words each: "
        f"{totals['Ir'] / len(fresh):,.0f} instructions per message"
    )


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("what", nargs="?", choices=["relay", "scoring", "scoring-child"])
    parser.add_argument("--messages", type=int, default=200, help="measured messages per run")
    parser.add_argument("--size", type=int, default=4096, help="message size in bytes")
    parser.add_argument("--clients", type=int, nargs="+", default=[8])
    parser.add_argument("--min-tokens", type=int, default=500_000, help="model size")
    parser.add_argument("--new-words", type=int, default=6, help="never-seen words per message")
    parser.add_argument(
        "--keep", type=Path, help="copy callgrind's files here, for callgrind_annotate"
    )
    parser.add_argument(
        "--cache-sim",
        action="store_true",
        help="relay: also count last-level cache misses (simulated; about twice as slow)",
    )
    parser.add_argument(
        "--without-judging",
        action="store_true",
        help="relay: count the daemon with a fixed verdict in place of judging (bench_relay.py)",
    )
    parser.add_argument(
        "--bigrams", action="store_true", help="a model with adjacent word pairs (--bigrams)"
    )
    parser.add_argument("--out", type=Path, help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.what != "scoring-child" and not (
        shutil.which("valgrind") and shutil.which("callgrind_control")
    ):
        raise SystemExit("needs valgrind (Debian: apt-get install valgrind)")
    if args.what == "scoring":
        scoring(args)
    elif args.what == "scoring-child":
        scoring_child(args)
    else:
        relay(args)


if __name__ == "__main__":
    main()
