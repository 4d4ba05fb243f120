"""Thread pool or process pool for the judge's CPU steps: throughput and event-loop lag.

Runs the real :class:`mailweir.daemon.judge.Judge` (tokenizer, SQLite store, scorer) over
synthetic messages of about 4 KB with a fixed number of messages in flight, once per pool kind,
while a ticker on the same event loop asks to wake every 10 ms and records how late it wakes.
The lag is what every other connection on the loop would feel.

    python bench/bench_pool.py [--messages 2000] [--concurrency 8] [--workers 2]

Prints one line per pool kind: messages per second, and the ticker's median, 99th-percentile
and maximum lateness in milliseconds.  Run it on the target machine; the figures quoted in
``daemon/judge.py`` came from a 2-core development machine.
"""

from __future__ import annotations

import argparse
import asyncio
import os
import random
import statistics
import sys
import tempfile
import time
from pathlib import Path

from mailweir.daemon import learning
from mailweir.daemon.judge import Judge, make_executor
from mailweir.daemon.scenario import generate
from mailweir.daemon.settings import ModelSettings, PolicySettings, Settings
from mailweir.model.hashing import message_digest
from mailweir.model.types import HAM, SPAM

FILLER = [
    "appointment",
    "reminder",
    "vaccination",
    "booster",
    "kennel",
    "cough",
    "clinic",
    "surgery",
    "invoice",
    "receipt",
    "prescription",
    "dosage",
    "weight",
    "check",
    "dental",
    "review",
    "reception",
    "rota",
    "supplier",
    "delivery",
    "order",
    "offer",
    "unlimited",
    "winner",
    "claim",
    "verify",
    "account",
    "password",
    "urgent",
    "transfer",
    "bonus",
    "discount",
    "limited",
    "exclusive",
    "guaranteed",
    "pharmacy",
    "shipping",
    "tracking",
    "parcel",
    "refund",
    "security",
    "login",
]


def padded(raw: bytes, rng: random.Random, size: int = 4096) -> bytes:
    """Append invented filler lines to the body until the message is about ``size`` bytes."""
    lines = []
    total = len(raw)
    while total < size:
        line = " ".join(rng.choice(FILLER) for _ in range(10)) + f" ref{rng.randrange(10**6)}"
        lines.append(line)
        total += len(line) + 2
    return raw + ("\r\n".join(lines) + "\r\n").encode("ascii")


def messages(count: int, size: int = 4096) -> list[bytes]:
    rng = random.Random(7)
    pool = generate(count // 2 + 1, "ham", 11) + generate(count // 2 + 1, "spam", 11)
    rng.shuffle(pool)
    return [padded(m.raw, rng, size) for m in pool[:count]]


def trained_store(path: Path) -> learning.OpenModel:
    model = learning.open_model(str(path))
    batch = []
    for label, name in ((HAM, "ham"), (SPAM, "spam")):
        for message in generate(300, name, 3):
            hashes = learning.model_hashes_only(model, message.raw)
            batch.append((hashes, label, message_digest(hashes), "bench"))
    model.store.train_many(batch)
    return model


async def run(judge: Judge, raws: list[bytes], concurrency: int) -> tuple[float, list[float]]:
    lateness: list[float] = []
    done = asyncio.Event()

    async def ticker() -> None:
        while not done.is_set():
            start = time.perf_counter()
            await asyncio.sleep(0.010)
            lateness.append(time.perf_counter() - start - 0.010)

    queue = list(reversed(raws))

    async def worker() -> None:
        while queue:
            judgement = await judge.judge(queue.pop())
            if judgement.band == "failed":
                raise RuntimeError("a judgement failed; see the log")

    tick = asyncio.create_task(ticker())
    started = time.perf_counter()
    await asyncio.gather(*(worker() for _ in range(concurrency)))
    elapsed = time.perf_counter() - started
    done.set()
    await tick
    return len(raws) / elapsed, lateness


async def main_async(args: argparse.Namespace) -> None:
    raws = messages(args.messages, args.size)
    with tempfile.TemporaryDirectory() as tmp:
        model = trained_store(Path(tmp) / "bench.sqlite3")
        settings = Settings(
            state_dir=Path(tmp),
            policy=PolicySettings(min_trained=10),
            model=ModelSettings(max_concurrent_scoring=args.concurrency),
        )
        size = sum(map(len, raws)) / len(raws)
        cores = len(os.sched_getaffinity(0))
        print(
            f"{len(raws)} messages of {size:.0f} bytes on average, {args.concurrency} in "
            f"flight, {args.workers} workers, {cores} cores, Python {sys.version.split()[0]}"
        )
        for round_ in range(1, args.repeat + 1):
            for kind in args.kinds:  # alternate the kinds so drift in the machine hits both
                with make_executor(args.workers, kind) as pool:
                    judge = Judge(model.store, settings, pool)
                    await run(judge, raws[:100], args.concurrency)  # warm up workers, caches
                    rate, lateness = await run(judge, raws, args.concurrency)
                ms = sorted(x * 1000 for x in lateness)
                p99 = ms[min(len(ms) - 1, int(len(ms) * 0.99))]
                print(
                    f"round {round_} {kind:8s} {rate:6.0f} msg/s   ticker lateness ms: "
                    f"median {statistics.median(ms):6.2f}  p99 {p99:6.2f}  max {ms[-1]:6.2f}"
                )
        model.close()


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--messages", type=int, default=2000)
    parser.add_argument("--concurrency", type=int, default=8)
    parser.add_argument("--workers", type=int, default=2)
    parser.add_argument("--kinds", nargs="+", default=["thread", "process"])
    parser.add_argument("--size", type=int, default=4096, help="message size in bytes")
    parser.add_argument("--repeat", type=int, default=1, help="rounds of every pool kind")
    asyncio.run(main_async(parser.parse_args()))


if __name__ == "__main__":
    main()
