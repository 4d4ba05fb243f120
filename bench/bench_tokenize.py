"""Tokenizer throughput: messages per second on synthetic 4 KB and 100 KB messages.

Optionally also on the Enron-Spam development corpus, read straight from its tarball when
present (/work/shared/corpora/dev/enron-spam-dev.tar.gz, or the path given with --corpus).

    python bench/bench_tokenize.py [--seconds 2] [--bigrams] [--corpus PATH]

Prints figures only; nothing here asserts a speed (machines are noisy).
"""

from __future__ import annotations

import argparse
import random
import tarfile
import time
from collections.abc import Callable
from pathlib import Path

from mailweir.model.tokenize import TokenizerOptions, tokenize

DEFAULT_CORPUS = Path("/work/shared/corpora/dev/enron-spam-dev.tar.gz")
_COMMON = (
    "appointment vaccine booster kennel cough surgery dental clean invoice payment reminder "
    "practice harbour lane reception please call tomorrow morning afternoon owner puppy kitten "
    "rabbit worming flea treatment prescription collect results blood test weight diet food "
    "order supplier delivery stock gloves syringes bandage consultation insurance claim form "
    "thank you regards best wishes friday monday week next last follow check recovery"
)


def _vocabulary(size: int, seed: int = 7) -> list[str]:
    """Our common words plus pseudo-words from random syllables, so messages have a long tail."""
    rng = random.Random(seed)
    syllables = [c + v for c in "bcdfghklmnprstvz" for v in "aeiou"]
    invented = {"".join(rng.choices(syllables, k=rng.randint(2, 4))) for _ in range(size)}
    return _COMMON.split() + sorted(invented)


_WORDS = _vocabulary(20_000)
# Zipf-like weights: the k-th word is drawn with probability proportional to 1/k.
_WEIGHTS = [1.0 / (rank + 1) for rank in range(len(_WORDS))]


def synthetic_message(size: int, seed: int, html: bool = False) -> bytes:
    """A plain-text (or multipart with HTML) message of about ``size`` bytes of our own words."""
    rng = random.Random(seed)
    lines = []
    length = 0
    while length < size:
        words = rng.choices(_WORDS, weights=_WEIGHTS, k=12)
        if rng.random() < 0.2:
            words.append(f"{rng.randint(1, 9999)}")
        line = " ".join(words).capitalize() + "."
        lines.append(line)
        length += len(line) + 2
    body = "\r\n".join(lines)
    head = (
        "Received: from mail.mail.example (mail.mail.example [198.51.100.7])\r\n"
        "\tby mx.harbourlane.example; Tue, 1 Dec 2026 09:00:00 +0000\r\n"
        'From: "Priya Raman" <priya.raman@harbourlane.example>\r\n'
        "To: owner@mail.example\r\n"
        f"Subject: Appointment reminder {seed}\r\n"
        "Date: Tue, 1 Dec 2026 09:00:00 +0000\r\n"
        f"Message-ID: <{seed}@harbourlane.example>\r\n"
        "MIME-Version: 1.0\r\n"
    )
    if not html:
        head += "Content-Type: text/plain; charset=utf-8\r\n\r\n"
        return (head + body + "\r\n").encode()
    markup = "<html><body><p>" + "</p><p>".join(lines) + "</p>"
    markup += '<a href="https://www.harbourlane.example/book">Book</a></body></html>'
    return (
        head + 'Content-Type: multipart/alternative; boundary="hl"\r\n\r\n'
        "--hl\r\nContent-Type: text/plain; charset=utf-8\r\n\r\n" + body + "\r\n"
        "--hl\r\nContent-Type: text/html; charset=utf-8\r\n\r\n" + markup + "\r\n--hl--\r\n"
    ).encode()


def rate(
    messages: list[bytes], run: Callable[[bytes], object], seconds: float
) -> tuple[float, float]:
    """Messages per CPU second: (mean over all passes, best single pass).

    CPU time of this process, not wall time, so other busy processes distort the figure less;
    the best pass is the figure least disturbed by them (as timeit reports).
    """
    for raw in messages[:50]:  # warm caches the way a running daemon has them warm
        run(raw)
    done = 0
    best = float("inf")
    start = time.process_time()
    while (elapsed := time.process_time() - start) < seconds:
        begin = time.process_time()
        for raw in messages:
            run(raw)
        best = min(best, time.process_time() - begin)
        done += len(messages)
    return done / elapsed, len(messages) / best


def calibration() -> float:
    """Microseconds of CPU for ``sum(range(1000))``: a yardstick to compare machines by
    (roughly 8-12 us on a current desktop core with CPython 3.11; from memory)."""
    best = float("inf")
    for _ in range(20):
        start = time.process_time()
        for _ in range(200):
            sum(range(1000))
        best = min(best, (time.process_time() - start) / 200 * 1e6)
    return best


def corpus_messages(path: Path, limit: int) -> list[bytes]:
    """Up to ``limit`` message files from a tarball, read in memory."""
    found: list[bytes] = []
    with tarfile.open(path) as archive:
        for member in archive:
            if member.isfile() and len(found) < limit:
                handle = archive.extractfile(member)
                if handle is not None:
                    found.append(handle.read())
    return found


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--seconds", type=float, default=2.0)
    parser.add_argument("--bigrams", action="store_true")
    parser.add_argument("--corpus", type=Path, default=DEFAULT_CORPUS)
    args = parser.parse_args()
    options = TokenizerOptions(bigrams=args.bigrams)

    def run(raw: bytes) -> object:
        return tokenize(raw, options)

    print(f"options {options.fingerprint()} bigrams={options.bigrams}")
    print(f"yardstick: sum(range(1000)) takes {calibration():.1f} us CPU here")
    for label, size, html in (
        ("4 KB plain", 4096, False),
        ("4 KB plain+html", 4096, True),
        ("100 KB plain", 100 * 1024, False),
    ):
        messages = [synthetic_message(size, seed, html) for seed in range(200)]
        mean, best = rate(messages, run, args.seconds)
        print(
            f"{label:16s} mean {mean:7.0f} msgs/s ({1000 / mean:6.3f} ms)  best {best:7.0f} msgs/s"
        )
    if args.corpus.exists():
        messages = corpus_messages(args.corpus, 2000)
        mean = sum(map(len, messages)) / max(len(messages), 1)
        speed, best = rate(messages, run, args.seconds)
        label = f"corpus {len(messages)} msgs of {mean:.0f} B"
        print(f"{label}: mean {speed:7.0f} msgs/s  best {best:7.0f} msgs/s")
    else:
        print(f"corpus skipped: {args.corpus} not found")


if __name__ == "__main__":
    main()
