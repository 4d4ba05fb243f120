"""``mailweir check``: is this configuration usable, and is this database healthy?

The configuration is loaded as ``mailweir run`` loads it (file, environment, flags) but every
problem is listed, each with its key and reason.  The database is opened read-only
(store/inspection.py).  With ``--connect`` the next hop is greeted and the listen addresses are
tried, so a check on the mail server shows what ``run`` would meet.

Exit status: 0 all well, 1 the database (or, with ``--connect``, the next hop or a listen
address) has problems, 2 the configuration has problems.
"""

from __future__ import annotations

import argparse
import asyncio
import datetime as dt
import errno
import os
import socket
from dataclasses import asdict, dataclass

from mailweir.daemon.command_args import config_arguments, json_argument, print_report
from mailweir.daemon.config import find_problems, load_settings
from mailweir.daemon.settings import HostPort, Settings
from mailweir.store.inspection import DatabaseReport, inspect_database

CONNECT_TIMEOUT = 5.0  # seconds for the next hop's greeting


@dataclass(frozen=True)
class Reachability:
    what: str  # "next_hop.address", "smtp.listen", "http.listen"
    address: str
    ok: bool
    detail: str


def add_command(sub: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    parser = sub.add_parser(
        "check",
        help="check a configuration file and the model database",
        description="Load the configuration as `mailweir run` would and list every problem "
        "with its key; open the database read-only and report schema, integrity (SQLite), "
        "model stamp, sizes and upkeep.  Exit 0: all well; 1: database problems; 2: "
        "configuration problems.",
    )
    config_arguments(parser)
    parser.add_argument(
        "--connect",
        action="store_true",
        help="also greet the next hop and try to bind the SMTP and HTTP listen addresses",
    )
    json_argument(parser)
    parser.set_defaults(handler=check_command)


def check_command(args: argparse.Namespace) -> int:
    flags = {"model.database": args.db} if args.db else {}
    problems = find_problems(args.config, dict(os.environ), flags)
    if problems:
        report: dict[str, object] = {
            "config": str(args.config) if args.config else None,
            "config_problems": [{"key": p.key, "reason": p.reason} for p in problems],
        }
        lines = [f"configuration {args.config or '(defaults and environment)'}: NOT usable"]
        lines += [f"  {p.key}: {p.reason}" for p in problems]
        print_report(args, report, lines)
        return 2
    settings = load_settings(args.config, dict(os.environ), flags)
    database = inspect_database(settings.database)
    reach = asyncio.run(_reachability(settings)) if args.connect else []
    report = {
        "config": str(args.config) if args.config else None,
        "config_problems": [],
        "database": asdict(database),
        "connect": [asdict(r) for r in reach],
    }
    lines = [f"configuration {args.config or '(defaults and environment)'}: ok"]
    lines += database_lines(database, settings)
    lines += [f"{r.what} {r.address}: {'ok' if r.ok else 'PROBLEM'}, {r.detail}" for r in reach]
    print_report(args, report, lines)
    return 1 if database.problems or not all(r.ok for r in reach) else 0


def database_lines(db: DatabaseReport, settings: Settings) -> list[str]:
    lines = [f"database {db.target} ({db.backend or 'not opened'})"]
    if db.integrity:
        lines.append(f"  integrity (quick_check): {db.integrity}")
    if db.applied or db.pending:
        pending = ", ".join(db.pending) or "none"
        lines.append(f"  schema: {len(db.applied)} migrations applied; pending: {pending}")
    if db.backend and not db.problems:
        stamp = f"method {db.method or '(not stamped)'}"
        if db.method and db.method != settings.model.method:
            stamp += f" (the daemon uses it over model.method = {settings.model.method!r})"
        lines += [
            f"  model: {stamp}; tokenizer {'stamped' if db.tokenizer else '(not stamped)'}",
            f"  tokens: {db.tokens}; trained ham {db.ham_messages}, spam {db.spam_messages}; "
            f"ledger {db.ledger_rows}",
            f"  verdict rows: {db.verdict_rows} (oldest {_when(db.oldest_verdict, 'none')}, "
            f"newest {_when(db.newest_verdict, 'none')}); feedback rows: {db.feedback_rows}",
            f"  size: {db.database_bytes} bytes",
            "  upkeep last run: "
            + ", ".join(f"{task} {_when(at)}" for task, at in db.upkeep_last_run.items()),
        ]
    lines += [f"  PROBLEM: {problem}" for problem in db.problems]
    return lines


def _when(at: float | None, missing: str = "never") -> str:
    if at is None:
        return missing
    return dt.datetime.fromtimestamp(at, dt.UTC).strftime("%Y-%m-%d %H:%M UTC")


async def _reachability(settings: Settings) -> list[Reachability]:
    helo = settings.next_hop.helo_name or settings.smtp.hostname or socket.getfqdn()
    found = [await _greet(settings.next_hop.address, helo, settings.next_hop.send_xforward)]
    found.append(_bindable("smtp.listen", settings.smtp.listen))
    found.append(_bindable("http.listen", settings.http.listen))
    return found


async def _greet(address: HostPort, helo: str, xforward: bool) -> Reachability:
    """Connect, read the greeting (RFC 5321 section 4.3.1: 220 ...), say EHLO to see whether
    it offers XFORWARD (when ``next_hop.send_xforward`` is on), say QUIT."""
    what = "next_hop.address"
    try:
        reader, writer = await asyncio.wait_for(
            asyncio.open_connection(address.host, address.port), CONNECT_TIMEOUT
        )
    except (OSError, TimeoutError) as exc:
        return Reachability(what, str(address), False, f"cannot connect: {exc or 'timeout'}")
    greeting, offers = b"", None
    try:
        greeting = await asyncio.wait_for(reader.readline(), CONNECT_TIMEOUT)
        if xforward and greeting.startswith(b"220"):
            writer.write(b"EHLO " + helo.encode("ascii", "replace") + b"\r\n")
            offers = await asyncio.wait_for(_extensions(reader), CONNECT_TIMEOUT)
        writer.write(b"QUIT\r\n")
        await writer.drain()
    except (OSError, TimeoutError):
        pass  # what was read so far is the answer
    finally:
        writer.close()
    text = greeting.decode("ascii", "replace").strip()
    ok = text.startswith("220")
    detail = text or "no greeting within 5 s"
    if ok and offers is not None:
        detail += (
            "; offers XFORWARD: its log will name each message's client"
            if "XFORWARD" in offers
            else "; no XFORWARD offered to us: its log will name mailweir as the client "
            "(Postfix: smtpd_authorized_xforward_hosts)"
        )
    return Reachability(what, str(address), ok, detail)


async def _extensions(reader: asyncio.StreamReader) -> list[str]:
    """The keywords of a (multi-line) EHLO reply, upper-cased; none if it is not 250."""
    found = []
    for _ in range(100):  # bounded: a reply longer than this is not one we can use
        line = (await reader.readline()).decode("ascii", "replace")
        if not line.startswith("250"):
            return []
        words = line[4:].split()
        if words:
            found.append(words[0].upper())
        if line[3:4] != "-":
            break
    return found[1:]  # the first line names the server


def _bindable(what: str, address: HostPort) -> Reachability:
    """Whether ``run`` could listen here now.  In use is no fault: the daemon may be running."""
    family = socket.AF_INET6 if ":" in address.host else socket.AF_INET
    with socket.socket(family, socket.SOCK_STREAM) as probe:
        probe.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
        try:
            probe.bind((address.host, address.port))
        except OSError as exc:
            in_use = exc.errno == errno.EADDRINUSE
            detail = "in use (the daemon running?)" if in_use else str(exc)
            return Reachability(what, str(address), in_use, detail)
    return Reachability(what, str(address), True, "free to listen on")
