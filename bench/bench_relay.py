"""mailweir against a bare relay, in one run on one machine: throughput, latency, CPU per message.

The same generated Harbour Lane messages go through (a) a bare aiosmtpd relay built the way
mailweir relays (bench/relay_parts.py) and (b) the real daemon, ``mailweir run`` in a
subprocess with a model of at least 500,000 tokens, both relaying to the same aiosmtpd sink.
The daemon runs in enforce mode with every band tagged, so each message is parsed, tokenized,
looked up, scored, rewritten with our header fields and logged (observe mode scores too, but
relays the message unchanged, skipping the header rewrite).

For each message size and client count it prints throughput, p50/p99 latency (MAIL FROM to the
250 after DATA), the server's CPU time per message (the server process and its pool workers,
from /proc), the kernel's part of it ("of sys": system calls and page faults), its minor page
faults per message, the CPU other processes of the machine used meanwhile (busy time from
/proc/stat minus this benchmark's own process tree), and the server tree's memory after each
run: RSS summed over its processes, and PSS, where a page the processes share (the libraries
the scoring pool's forkserver preloaded) counts once, with the part of the PSS that maps
files ("of file": the libraries, and the pages of the SQLite model its memory map has read,
which the kernel can drop and read again).  Before each pair, a memory probe
(``machine_probe.py``: random reads from 32 MB) shows what other tenants of the processor's
caches, invisible in /proc, are doing to mailweir's table lookups.  The machine is shared:
compare only within one run.  Under each pair, a line gives the daemon's own account of its
judging: parse (tokenize and hash) and look up and score, per message, from its
``mailweir_parsing_seconds`` and ``mailweir_scoring_seconds`` histograms (wall time: on the
event loop for mail under 16 KiB; for larger mail parsing includes the hand-off to the pool).
Beside ``bench_scoring.py``'s figures for the same steps alone, they show what judging costs
amid the SMTP work.  Each message size
starts with one unmeasured pass of its messages through the daemon (the count cache then
holds their tokens), and each run with a short warm-up.  Each measured run then sends them
with a last line of ``--new-words`` (6) words never seen before, new for every run, as real
mail brings (about 6 of 110 tokens per message on the development corpus): the daemon has to
ask the database about those, as it would in service.  With ``--new-words 0`` every count is
in memory, the best case.  The bare relay sends DATA as
mailweir does (``relay_parts.py``), so that the two differ by the judging alone;
``--bare-data library`` has it use aiosmtplib's ``data`` instead, as the simplest relay would
(3-5% more CPU a 4 KB message; the figures in the README before 3 December 07:00 UTC were
measured that way).

``--without-judging`` adds a third server to every round: the same daemon with its judging
step replaced by a fixed verdict (``_UNJUDGED_DAEMON``), so it receives, records, tags, logs
and relays each message as mailweir does, but never parses, tokenizes, looks up or scores it.
Its row splits mailweir's CPU in two within one round: the daemon's own relaying, against the
bare relay's, and the judging as it costs in the running daemon (mailweir's CPU less this
row's), against ``bench_scoring.py``'s figure for the scoring path alone.

    python bench/bench_relay.py                          # a few minutes
    python bench/bench_relay.py --messages 4000 --large-messages 800 --rounds 2
    python bench/bench_relay.py --sizes 4KB --clients 8 --rounds 9   # the target's spread
    python bench/bench_relay.py --sizes 4KB --clients 8 --rounds 9 --without-judging
    python bench/bench_relay.py --sizes 4KB --clients 8 --rounds 9 --bigrams  # a bigram model
    python bench/bench_relay.py --sizes 4KB --clients 8 --rounds 5 \
        --postgres postgresql+psycopg://mailweir@127.0.0.1:54329/postgres

``--postgres URL`` puts the daemon's model on a PostgreSQL server, as when several daemons
share one: the bench makes a database of its own there (``CREATE DATABASE``, so the role needs
CREATEDB), imports the same model into it (``store/exchange.py``) and drops it at the end.
The daemon preloads it from there as from a SQLite file; the server still gets the verdict
log's batches and the revision check every ``model.staleness_seconds``.  A line under each
pair gives the database server's CPU per message: its postmaster's process tree, read from
/proc, so the server must run on this machine.

With more than one round, a last table gives each pair's median and range over the rounds.

``--interleave N`` cuts each round's messages into N slices and sends them to the servers in
turn, slice by slice (the bare relay first in even slices, mailweir first in odd ones), each
server's figures summed over its slices: the machine's speed, which drifts over seconds on
this shared host, then weighs on both servers alike, where a round of two whole runs in a
row puts a drift between them.  Each server's connections stay open from slice to slice, so
a message carries the same share of connection set-up as in a whole run.

Everything listens on 127.0.0.1; counts are bounded.
"""

from __future__ import annotations

import argparse
import asyncio
import math
import os
import shutil
import statistics
import subprocess
import sys
import tempfile
import threading
import time
import tomllib
import urllib.request
from collections.abc import Callable, Iterator
from contextlib import AsyncExitStack, ExitStack, contextmanager
from dataclasses import dataclass, field
from pathlib import Path

BENCH = Path(__file__).resolve().parent
sys.path.insert(0, str(BENCH))

import bench_mail  # noqa: E402
import proc_cpu  # noqa: E402
from machine_probe import random_read_ns  # noqa: E402
from relay_parts import LOCAL, Results, Sessions, push  # noqa: E402

PYTHON = sys.executable
MAILWEIR = str(Path(PYTHON).with_name("mailweir"))
# The daemon with a fixed verdict in place of judging (--without-judging; bench_instructions.py
# uses the same patch).  Its token hashes stand in for the message's in the verdict record,
# about as many as the tokenizer makes (210 for the generated 4 KB mail; one per 20 bytes, at
# most the 4,000 a message keeps).
FIXED_VERDICT = """
import inspect
import numpy as np
from mailweir.daemon import judge

# A changed signature would fail every message into the "failed" band, quietly: refuse.
expected = ["self", "tracking_id", "raw", "policy", "executor"]
if list(inspect.signature(judge.Judge._judge).parameters) != expected:
    raise SystemExit("bench: Judge._judge changed; update FIXED_VERDICT in bench_relay.py")

HASHES = np.sort(np.random.default_rng(7).integers(-2**63, 2**63 - 1, 4000, dtype=np.int64))
EVIDENCE = (("invoice", 2.1), ("overdue", 1.4), ("harbour", -3.0), ("rota", -2.2))

async def fixed_verdict(self, tracking_id, raw, policy, executor):
    hashes = HASHES[: max(1, min(4000, len(raw) // 20))]
    return judge.Judgement(tracking_id, "ham", 0.02, EVIDENCE, hashes)

judge.Judge._judge = fixed_verdict
"""
# What ``python -c`` runs last to be the daemon, after any patches before it.
RUN_DAEMON = """
import sys
from mailweir.daemon.entry import main

sys.argv[0] = "mailweir"
main()
"""
_UNJUDGED_DAEMON = FIXED_VERDICT + RUN_DAEMON


@dataclass
class Figures:
    server: str
    size: str
    clients: int
    sent: int
    failed: int
    seconds: float
    p50_ms: float
    p99_ms: float
    cpu_ms: float  # server CPU per message
    sys_ms: float  # the kernel's part of it
    faults: float  # the server's minor page faults per message
    others_cpu: float  # CPU seconds of other processes during the run
    rss_mb: float  # summed over the server's process tree
    pss_mb: float  # the same, shared pages counted once
    file_mb: float  # of the PSS, pages of mapped files (libraries, the model's memory map)
    # The daemon's own account of its judging per message (its mailweir_parsing_seconds and
    # mailweir_scoring_seconds histograms: wall time on the event loop), nan for other servers.
    parse_ms: float = float("nan")
    score_ms: float = float("nan")
    db_cpu_ms: float = float("nan")  # the PostgreSQL server's CPU per message (--postgres)
    latencies: list[float] = field(default_factory=list, repr=False)  # seconds, sorted

    @property
    def rate(self) -> float:
        return self.sent / self.seconds


# pid, port, the daemon's /metrics address (None: none), its database server's pid (None: none)
Server = tuple[int, int, str | None, int | None]
Round = tuple[Figures, Figures, Figures | None]  # bare, mailweir, mailweir without judging


def _free_port() -> int:
    import socket

    with socket.socket() as sock:
        sock.bind((LOCAL, 0))
        return int(sock.getsockname()[1])


def _start(
    argv: list[str], port_file: Path | None, port: int | None = None, wait: float = 60
) -> tuple[subprocess.Popen[bytes], int]:
    process = subprocess.Popen(argv, stdin=subprocess.DEVNULL)
    deadline = time.monotonic() + wait
    while time.monotonic() < deadline:
        if process.poll() is not None:
            raise SystemExit(f"{argv[:3]} exited with {process.returncode}")
        if port_file is not None and port_file.exists() and port_file.read_text():
            port = int(port_file.read_text())
        if port is not None and _greets(port):
            return process, port
        time.sleep(0.1)
    process.terminate()
    raise SystemExit(f"{argv[:3]} did not start listening")


def _greets(port: int) -> bool:
    import socket

    try:
        with socket.create_connection((LOCAL, port), timeout=1) as sock:
            return sock.recv(3) == b"220"
    except OSError:
        return False


def _mailweir_config(
    folder: Path,
    model: Path,
    sink_port: int,
    port: int,
    model_keys: str = "",
    log_keys: str = "",
    database_url: str | None = None,
) -> Path:
    """The daemon's configuration; *model_keys*, *log_keys*: more lines for those tables;
    *database_url*: the model there (already imported) instead of a copy of *model*.

    Upkeep is off: its tasks, overdue on a fresh copy of the model, ran 60 s after the daemon
    started (0.11 s of CPU together) and added to whichever round was running then;
    ``bench/bench_upkeep.py`` measures them."""
    database: Path | str | None = database_url
    if database is None:
        database = folder / "model.sqlite3"
        shutil.copyfile(model, database)
    config = folder / "mailweir.toml"
    config.write_text(
        f'state_dir = "{folder / "state"}"\n'
        f'[smtp]\nlisten = "{LOCAL}:{port}"\nhostname = "filter.harbourlane.example"\n'
        f'[next_hop]\naddress = "{LOCAL}:{sink_port}"\n'
        'helo_name = "filter.harbourlane.example"\n'
        '[policy]\nmode = "enforce"\nham_action = "tag"\nsuspect_action = "tag"\n'
        'spam_action = "tag"\n'
        f'[model]\ndatabase = "{database}"\n{model_keys}'
        "[upkeep]\nprune_every_hours = 0\ntrim_every_hours = 0\ntidy_every_hours = 0\n"
        f'[http]\nlisten = "{LOCAL}:{_free_port()}"\n'
        '[log]\nlevel = "warning"\n' + log_keys
    )
    return config


def _measure(
    name: str,
    pid: int,
    port: int,
    metrics: str | None,
    db_pid: int | None,
    messages: list[bytes],
    clients: int,
    size: str,
) -> Figures:
    """One whole run: a warm-up (connections, caches), then every message, over connections
    opened for it."""
    asyncio.run(push(port, messages[: clients * 4], clients))
    before = _Counters.read(pid, metrics, db_pid)
    started = time.perf_counter()
    results = asyncio.run(push(port, messages, clients))
    seconds = time.perf_counter() - started
    return before.figures(name, size, clients, results, seconds)


@dataclass
class _Counters:
    """What a server's figures are differences of, read before and after its messages."""

    pid: int
    metrics: str | None
    db_pid: int | None
    steps: tuple[float, ...]
    db: dict[int, float]
    server: dict[int, float]
    kernel: dict[int, float]
    faults: dict[int, float]
    ours: dict[int, float]
    busy: float

    @classmethod
    def read(cls, pid: int, metrics: str | None, db_pid: int | None) -> _Counters:
        return cls(
            pid,
            metrics,
            db_pid,
            _judge_steps(metrics),
            proc_cpu.tree_seconds(db_pid) if db_pid is not None else {},
            proc_cpu.tree_seconds(pid),
            proc_cpu.tree_counts(pid, proc_cpu.system_seconds),
            proc_cpu.tree_counts(pid, proc_cpu.minor_faults),
            proc_cpu.tree_seconds(os.getpid()),
            proc_cpu.machine_busy_seconds(),
        )

    def figures(
        self, name: str, size: str, clients: int, results: Results, seconds: float
    ) -> Figures:
        """The figures of the messages sent since this was read."""
        after = _Counters.read(self.pid, self.metrics, self.db_pid)
        steps = [b - a for a, b in zip(self.steps, after.steps, strict=True)]
        busy = after.busy - self.busy
        ours = proc_cpu.used(self.ours, after.ours)
        server = proc_cpu.used(self.server, after.server)
        db = proc_cpu.used(self.db, after.db) if self.db_pid is not None else math.nan
        kernel = proc_cpu.used(self.kernel, after.kernel)
        faults = proc_cpu.used(self.faults, after.faults)
        ordered = sorted(results.latencies)
        latencies = ordered or [float("nan")]
        sent = len(ordered)
        if results.failures:
            print(f"  {name}: {len(results.failures)} failures, first: {results.failures[0]}")
        tree = proc_cpu.tree_pids(self.pid)
        return Figures(
            name,
            size,
            clients,
            sent,
            len(results.failures),
            seconds,
            statistics.median(latencies) * 1e3,
            latencies[min(len(latencies) - 1, int(0.99 * len(latencies)))] * 1e3,
            server / max(sent, 1) * 1e3,
            kernel / max(sent, 1) * 1e3,
            faults / max(sent, 1),
            max(0.0, busy - ours),
            sum(proc_cpu.rss_bytes(p) for p in tree) / 2**20,
            sum(proc_cpu.pss_bytes(p) for p in tree) / 2**20,
            sum(proc_cpu.pss_file_bytes(p) for p in tree) / 2**20,
            steps[0] / steps[2] * 1e3 if steps[2] else float("nan"),
            steps[1] / steps[2] * 1e3 if steps[2] else float("nan"),
            db / max(sent, 1) * 1e3,
            ordered,
        )


def _merged(parts: list[Figures]) -> Figures:
    """One server's figures over the slices of an interleaved round: per-message figures
    weighted by the messages of each slice, latencies pooled, memory as the last slice left
    it."""
    sent = sum(p.sent for p in parts) or 1
    latencies = sorted(x for p in parts for x in p.latencies) or [float("nan")]

    def per_message(value: Callable[[Figures], float]) -> float:
        return sum(value(p) * p.sent for p in parts) / sent

    last = parts[-1]
    return Figures(
        last.server,
        last.size,
        last.clients,
        sum(p.sent for p in parts),
        sum(p.failed for p in parts),
        sum(p.seconds for p in parts),
        statistics.median(latencies) * 1e3,
        latencies[min(len(latencies) - 1, int(0.99 * len(latencies)))] * 1e3,
        per_message(lambda p: p.cpu_ms),
        per_message(lambda p: p.sys_ms),
        per_message(lambda p: p.faults),
        sum(p.others_cpu for p in parts),
        last.rss_mb,
        last.pss_mb,
        last.file_mb,
        per_message(lambda p: p.parse_ms),
        per_message(lambda p: p.score_ms),
        per_message(lambda p: p.db_cpu_ms),
        latencies,
    )


_STEP_SERIES = (
    "mailweir_parsing_seconds_sum",
    "mailweir_scoring_seconds_sum",
    "mailweir_scoring_seconds_count",
)


def _judge_steps(metrics: str | None) -> tuple[float, ...]:
    """The daemon's summed parse and score seconds and its count of scored messages, from its
    /metrics page (zeros without one)."""
    if metrics is None:
        return (0.0,) * len(_STEP_SERIES)
    with urllib.request.urlopen(metrics, timeout=10) as reply:
        return step_values(reply.read().decode())


def step_values(page: str) -> tuple[float, ...]:
    """``_STEP_SERIES``' values on a Prometheus exposition page (0 for one it lacks)."""
    values = dict(line.split(" ", 1) for line in page.splitlines() if line.startswith(_STEP_SERIES))
    return tuple(float(values.get(series, 0.0)) for series in _STEP_SERIES)


def _print(bare: Figures, mine: Figures, read_ns: float, unjudged: Figures | None) -> None:
    for f in (bare, mine) if unjudged is None else (bare, mine, unjudged):
        print(
            f"{f.size:>6} {f.clients:>3} {f.server:<8} {f.rate:8.0f} {f.p50_ms:8.1f} "
            f"{f.p99_ms:8.1f} {f.cpu_ms:8.2f} {f.sys_ms:6.2f} {f.faults:6.1f} "
            f"{f.others_cpu:7.1f}s {f.rss_mb:6.0f} {f.pss_mb:6.0f} {f.file_mb:6.0f}"
        )
    print(
        f"{'':>6} {'':>3} {'ratio':<8} {mine.rate / bare.rate:8.2f} "
        f"{mine.p50_ms / bare.p50_ms:8.2f} {mine.p99_ms / bare.p99_ms:8.2f} "
        f"{mine.cpu_ms / bare.cpu_ms:8.2f}   added p99 {mine.p99_ms - bare.p99_ms:.1f} ms, "
        f"memory probe {read_ns:.1f} ns"
    )
    if unjudged is not None:
        print(
            f"{'':>6} {'':>3} {'':<8} {'':>35} relaying {unjudged.cpu_ms / bare.cpu_ms:.2f} "
            f"of the bare relay's CPU, judging {mine.cpu_ms - unjudged.cpu_ms:.2f} ms a message"
        )
    print(
        f"{'':>6} {'':>3} {'':<8} {'':>35} the daemon's judge: parse {mine.parse_ms:.2f}, "
        f"look up and score {mine.score_ms:.2f} ms a message"
    )
    if not math.isnan(mine.db_cpu_ms):
        print(
            f"{'':>6} {'':>3} {'':<8} {'':>35} its PostgreSQL server: {mine.db_cpu_ms:.2f} ms "
            f"of CPU a message, {(mine.cpu_ms + mine.db_cpu_ms) / bare.cpu_ms:.2f} times the "
            "bare relay's with the daemon's"
        )


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--messages", type=int, default=800, help="4 KB messages per run")
    parser.add_argument("--large-messages", type=int, default=150, help="100 KB ones per run")
    parser.add_argument("--clients", type=int, nargs="+", default=[1, 8, 32])
    parser.add_argument("--rounds", type=int, default=1, help="repeat every pair of runs")
    parser.add_argument(
        "--sizes", nargs="+", choices=["4KB", "100KB"], default=["4KB", "100KB"], help="sizes"
    )
    parser.add_argument("--min-tokens", type=int, default=500_000, help="model size")
    parser.add_argument(
        "--new-words", type=int, default=6, help="never-seen words per measured message (0: none)"
    )
    parser.add_argument(
        "--bare-data",
        choices=["library", "wire"],
        default="wire",
        help="how the bare relay sends DATA: as mailweir does (the default), or aiosmtplib's data",
    )
    parser.add_argument(
        "--without-judging",
        action="store_true",
        help="also run the daemon with a fixed verdict in place of judging (module docstring)",
    )
    parser.add_argument(
        "--bigrams",
        action="store_true",
        help="the daemon's model counts adjacent word pairs too (mailweir train --bigrams)",
    )
    parser.add_argument(
        "--interleave",
        type=int,
        default=1,
        metavar="N",
        help="send each round's messages in N slices, to the servers in turn (module docstring)",
    )
    parser.add_argument(
        "--postgres",
        metavar="URL",
        help="the daemon's model in a database of its own made on this PostgreSQL server "
        "(module docstring)",
    )
    args = parser.parse_args()
    model = bench_mail.build_model(args.min_tokens, bigrams=args.bigrams)
    with tempfile.TemporaryDirectory(prefix="mailweir-bench-relay-") as tmp, ExitStack() as stop:
        folder = Path(tmp)
        here = [PYTHON, str(BENCH / "relay_parts.py")]
        # Each process is stopped however the run ends, a later one failing to start included.
        sink, sink_port = _start([*here, "sink", str(folder / "sink")], folder / "sink")
        stop.callback(_stop, sink)
        wire = ["--wire"] if args.bare_data == "wire" else []
        bare, bare_port = _start(
            [*here, "bare", f"{LOCAL}:{sink_port}", str(folder / "bare"), *wire], folder / "bare"
        )
        stop.callback(_stop, bare)
        port = _free_port()
        database_url, db_pid = None, None
        if args.postgres:
            database_url, db_pid = stop.enter_context(_postgres_model(args.postgres, model))
        config = _mailweir_config(folder, model, sink_port, port, database_url=database_url)
        daemon, _ = _start([MAILWEIR, "run", "--config", str(config)], None, port)
        stop.callback(_stop, daemon)
        daemon_metrics = _metrics_url(config)
        unjudged: Server | None = None
        if args.without_judging:
            (folder / "unjudged").mkdir()
            other_port = _free_port()
            config = _mailweir_config(folder / "unjudged", model, sink_port, other_port)
            argv = [PYTHON, "-c", _UNJUDGED_DAEMON, "run", "--config", str(config)]
            other, _ = _start(argv, None, other_port)
            stop.callback(_stop, other)
            unjudged = (other.pid, other_port, None, None)
        _run(
            args,
            (bare.pid, bare_port, None, None),
            (daemon.pid, port, daemon_metrics, db_pid),
            unjudged,
        )


@contextmanager
def _postgres_model(server_url: str, model: Path) -> Iterator[tuple[str, int]]:
    """A database of its own on *server_url*'s server holding *model*: its URL and the
    server's postmaster pid (whose process tree is every backend); dropped at the end."""
    from sqlalchemy import create_engine, text
    from sqlalchemy.engine import make_url

    from mailweir.store import ModelStore
    from mailweir.store.exchange import ModelExport, import_model

    name = f"mailweir_bench_relay_{os.getpid()}"
    admin = create_engine(server_url, isolation_level="AUTOCOMMIT")
    try:
        with admin.connect() as conn:
            backend = conn.execute(text("SELECT pg_backend_pid()")).scalar_one()
            conn.execute(text(f'CREATE DATABASE "{name}"'))
        postmaster = proc_cpu.parent_pid(int(backend))
        if postmaster is None:
            raise SystemExit("bench: --postgres needs the server on this machine (its CPU)")
        url = make_url(server_url).set(database=name).render_as_string(hide_password=False)
        try:
            source, target = ModelStore.open(str(model), create=False), ModelStore.open(url)
            try:
                started = time.perf_counter()
                summary = import_model(target, ModelExport(source))
                print(
                    f"model imported into PostgreSQL database {name}: {summary.tokens} tokens "
                    f"in {time.perf_counter() - started:.1f} s"
                )
            finally:
                source.close()
                target.close()
            yield url, postmaster
        finally:
            with admin.connect() as conn:
                conn.execute(text(f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)'))
    finally:
        admin.dispose()


def _metrics_url(config: Path) -> str:
    listen = tomllib.loads(config.read_text())["http"]["listen"]
    return f"http://{listen}/metrics"


def _stop(process: subprocess.Popen[bytes]) -> None:
    process.terminate()
    process.wait(30)


class PeakPss:
    """The largest PSS of a process tree while the ``with`` block runs, read every 20 ms from
    a thread (/proc has a high-water mark for RSS only, which counts a file page once per
    mapping: the daemon's SQLite connections each map the model file)."""

    def __init__(self, pid: int) -> None:
        self.pid = pid
        self.mb = 0.0
        self._done = threading.Event()
        self._thread = threading.Thread(target=self._watch, daemon=True)

    def __enter__(self) -> PeakPss:
        self._thread.start()
        return self

    def __exit__(self, *exc: object) -> None:
        self._done.set()
        self._thread.join()

    def _watch(self) -> None:
        while not self._done.wait(0.02):
            pss = sum(proc_cpu.pss_bytes(p) for p in proc_cpu.tree_pids(self.pid)) / 2**20
            self.mb = max(self.mb, pss)


def _run(
    args: argparse.Namespace, bare_relay: Server, daemon: Server, unjudged: Server | None
) -> None:
    print(
        f"cores {os.cpu_count()}, load average {os.getloadavg()[0]:.2f} at start, "
        f"{args.new_words} new words per message, the bare relay's DATA by {args.bare_data}"
    )
    print(
        f"{'size':>6} {'cli':>3} {'server':<8} {'msg/s':>8} {'p50 ms':>8} {'p99 ms':>8} "
        f"{'cpu ms':>8} {'of sys':>6} {'faults':>6} {'others':>8} {'RSS MB':>6} {'PSS MB':>6} "
        f"{'of file':>7}"
    )
    salt = 0  # each run's new words are new to the daemon too
    pairs: dict[tuple[str, int], list[Round]] = {}
    for size, count in ((4096, args.messages), (100 * 1024, args.large_messages)):
        label = f"{size // 1024}KB"
        if label not in args.sizes:
            continue
        messages = [bench_mail.message(i, size, seed=7) for i in range(count)]
        # One pass first, so the count cache holds these messages' tokens: the steady state
        # of a site whose model fits model.cache_tokens (the default is 1,000,000).  The
        # daemon's first pass meets its preload still running, as after a restart under load.
        with PeakPss(daemon[0]) as starting:
            asyncio.run(push(daemon[1], messages, 8))
        if unjudged is not None:
            asyncio.run(push(unjudged[1], messages, 8))
        print(f"{label:>6} mailweir's largest PSS in its first pass: {starting.mb:.0f} MB")
        for clients in args.clients:
            for _ in range(args.rounds):
                salt += 1
                fresh = [
                    bench_mail.with_new_words(raw, i, args.new_words, salt)
                    for i, raw in enumerate(messages)
                ]
                read_ns = random_read_ns()
                servers = [("bare", bare_relay), ("mailweir", daemon)]
                if unjudged is not None:
                    servers.append(("no-judge", unjudged))
                found = _measure_round(servers, fresh, clients, label, args.interleave)
                bare, mine = found[0], found[1]
                other = found[2] if unjudged is not None else None
                _print(bare, mine, read_ns, other)
                pairs.setdefault((label, clients), []).append((bare, mine, other))
    if args.rounds > 1:
        _summarize(pairs)


def _measure_round(
    servers: list[tuple[str, Server]],
    messages: list[bytes],
    clients: int,
    label: str,
    slices: int,
) -> list[Figures]:
    """Each server's figures for one round: one whole run after another, or with *slices*
    above one, the messages' slices to each in turn (``--interleave``)."""
    if slices <= 1:
        return [_measure(name, *server, messages, clients, label) for name, server in servers]
    return asyncio.run(_interleaved(servers, messages, clients, label, slices))


async def _interleaved(
    servers: list[tuple[str, Server]],
    messages: list[bytes],
    clients: int,
    label: str,
    slices: int,
) -> list[Figures]:
    """``--interleave``: each server's connections stay open across the slices, so each
    message carries the same share of connection set-up as in a whole run."""
    parts: list[list[Figures]] = [[] for _ in servers]
    async with AsyncExitStack() as stack:
        sessions = [
            await stack.enter_async_context(Sessions(port, clients))
            for _, (_, port, _, _) in servers
        ]
        for session in sessions:  # the warm-up, as a whole run has
            await session.push(messages[: clients * 4])
        for i in range(slices):
            chunk = messages[i * len(messages) // slices : (i + 1) * len(messages) // slices]
            order = list(range(len(servers)))
            if i % 2:
                order.reverse()
            for k in order:
                name, (pid, _, metrics, db_pid) = servers[k]
                before = _Counters.read(pid, metrics, db_pid)
                started = time.perf_counter()
                results = await sessions[k].push(chunk)
                seconds = time.perf_counter() - started
                parts[k].append(before.figures(name, label, clients, results, seconds))
    return [_merged(p) for p in parts]


def _summarize(pairs: dict[tuple[str, int], list[Round]]) -> None:
    """Median and range over the rounds of each pair: one round's ratio moves with the
    machine (other tenants of the processor's caches), so a target is judged on the spread."""
    print("over the rounds: median [least-most] of mailweir / bare")
    split = all(other is not None for runs in pairs.values() for _, _, other in runs)
    more = f" {'relaying cpu':>18} {'judging ms':>18}" if split else ""
    print(f"{'size':>6} {'cli':>3} {'msg/s':>18} {'cpu ms':>18} {'added p99 ms':>20}{more}")
    for (label, clients), runs in pairs.items():
        rate = [mine.rate / bare.rate for bare, mine, _ in runs]
        cpu = [mine.cpu_ms / bare.cpu_ms for bare, mine, _ in runs]
        added = [mine.p99_ms - bare.p99_ms for bare, mine, _ in runs]
        columns = f"{_spread(rate):>18} {_spread(cpu):>18} {_spread(added):>20}"
        if split:
            relaying = [o.cpu_ms / bare.cpu_ms for bare, _, o in runs if o is not None]
            judging = [mine.cpu_ms - o.cpu_ms for _, mine, o in runs if o is not None]
            columns += f" {_spread(relaying):>18} {_spread(judging):>18}"
        print(f"{label:>6} {clients:>3} {columns}")
        parse = [mine.parse_ms for _, mine, _ in runs]
        score = [mine.score_ms for _, mine, _ in runs]
        if not any(math.isnan(value) for value in parse + score):
            print(
                f"{'':>6} {'':>3} the daemon's judge, ms a message: parse {_spread(parse)}, "
                f"look up and score {_spread(score)}"
            )


def _spread(values: list[float]) -> str:
    return f"{statistics.median(values):.2f} [{min(values):.2f}-{max(values):.2f}]"


if __name__ == "__main__":
    main()
