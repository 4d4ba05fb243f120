"""``mailweir held``, ``release`` and ``digest``: the quarantine by hand.

They read the daemon's configuration (``--config``, the environment, ``--state-dir``,
``--next-hop``) so they find the same quarantine folder and next hop; the daemon may keep
running meanwhile (a release is claimed on disk, so it happens once whoever asks).
"""

from __future__ import annotations

import argparse
import asyncio
import datetime
import logging
import os
import sys
import time
from collections.abc import Callable

from mailweir.daemon import digest
from mailweir.daemon.command_args import config_file_argument, json_argument, print_report
from mailweir.daemon.config import ConfigSource
from mailweir.daemon.errors import ConfigError
from mailweir.daemon.quarantine import Quarantine
from mailweir.daemon.settings import Settings
from mailweir.store.held_mail import HeldEnvelope, HeldMailError

Handler = Callable[[argparse.Namespace], int]
log = logging.getLogger("mailweir.quarantine")


def add_commands(sub: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    """Register ``held``, ``release`` and ``digest`` on the ``mailweir`` subparsers."""
    held = sub.add_parser(
        "held",
        help="list held mail; --expire deletes what is past retention",
        description="List the messages the quarantine holds (rerouted mail), oldest first, "
        "with a line on those older than quarantine.retention_days. Nothing expires by "
        "itself: --expire deletes those, and logs each.",
    )
    held.add_argument("--expire", action="store_true", help="delete held mail past retention")
    _config_arguments(held)
    json_argument(held)
    held.set_defaults(handler=cmd_held)

    release = sub.add_parser(
        "release",
        help="deliver held mail to its original recipients",
        description="Send each held message, byte for byte as it arrived, to its original "
        "recipients through the next hop. A message is released once.",
    )
    release.add_argument("tracking_ids", nargs="+", metavar="TRACKING_ID")
    _config_arguments(release)
    json_argument(release)
    release.set_defaults(handler=cmd_release)

    digest_parser = sub.add_parser(
        "digest",
        help="print or send the digest of held mail",
        description="Compose the digest of mail held in the last day (what the daemon sends "
        "daily at quarantine.digest_time) and print it or send it through the next hop.",
    )
    what = digest_parser.add_mutually_exclusive_group(required=True)
    what.add_argument("--print", action="store_true", help="write the digest mails to stdout")
    what.add_argument("--send", action="store_true", help="send them through the next hop")
    digest_parser.add_argument("--hours", type=float, default=24.0, help="window (default 24)")
    _config_arguments(digest_parser)
    digest_parser.set_defaults(handler=cmd_digest)


def _config_arguments(parser: argparse.ArgumentParser) -> None:
    config_file_argument(parser)
    parser.add_argument("--state-dir", metavar="PATH", help="the daemon's state directory")
    parser.add_argument("--next-hop", metavar="HOST:PORT", help="SMTP server to release to")


def _settings(args: argparse.Namespace) -> Settings:
    flags = {"state_dir": args.state_dir, "next_hop.address": args.next_hop}
    names = {"state_dir": "--state-dir", "next_hop.address": "--next-hop"}
    given = {key: text for key, text in flags.items() if text is not None}
    logging.basicConfig(level=logging.INFO, format="%(levelname)s %(name)s: %(message)s")
    return ConfigSource(args.config, dict(os.environ), given, names).load()


def _guarded(command: Handler) -> Handler:
    def run(args: argparse.Namespace) -> int:
        try:
            return command(args)
        except ConfigError as exc:
            print(f"mailweir: configuration error: {exc}", file=sys.stderr)
            return 2

    return run


# -- held ---------------------------------------------------------------------------------


def _when(stamp: float | None) -> str:
    if stamp is None:
        return "-"
    return datetime.datetime.fromtimestamp(stamp).astimezone().strftime("%Y-%m-%d %H:%M")


def _line(envelope: HeldEnvelope, now: float) -> str:
    days = (now - envelope.held_at) / 86400.0
    state = (
        f"released {_when(envelope.released_at)} by {envelope.released_by}"
        if envelope.released
        else "held"
    )
    score = "-" if envelope.score is None else f"{envelope.score:.3f}"
    return (
        f"{envelope.tracking_id}  {_when(envelope.held_at)} ({days:.1f} d)  score {score}  "
        f"{envelope.sender or '<>'} -> {', '.join(envelope.recipients)}  [{state}]"
    )


@_guarded
def cmd_held(args: argparse.Namespace) -> int:
    settings = _settings(args)
    quarantine = Quarantine(settings)
    retention = settings.quarantine.retention_days
    now = time.time()
    expired: list[HeldEnvelope] = []
    if args.expire:
        expired = quarantine.store.expire(now - retention * 86400.0)
        for envelope in expired:
            log.info("expired held mail: %s", _line(envelope, now))
    envelopes = quarantine.store.envelopes()
    figures = quarantine.store.figures(retention, now)
    lines = [_line(e, now) for e in envelopes]
    lines.append(f"{figures.held} held, {figures.released} released, in {quarantine.store.folder}")
    if figures.past_retention:
        lines.append(
            f"{figures.past_retention} older than quarantine.retention_days ({retention} days): "
            "`mailweir held --expire` deletes them"
        )
    if args.expire:
        lines.append(f"expired {len(expired)} held message(s) older than {retention} days")
    report = {
        "folder": str(quarantine.store.folder),
        "held": [e.to_json() for e in envelopes],
        "figures": vars(figures),
        "retention_days": retention,
        "expired": [e.tracking_id for e in expired],
    }
    print_report(args, report, lines)
    return 0


# -- release ------------------------------------------------------------------------------


@_guarded
def cmd_release(args: argparse.Namespace) -> int:
    quarantine = Quarantine(_settings(args))
    return asyncio.run(_release_all(quarantine, args))


async def _release_all(quarantine: Quarantine, args: argparse.Namespace) -> int:
    results: dict[str, dict[str, object]] = {}
    lines = []
    for tracking_id in args.tracking_ids:
        try:
            done = await quarantine.release(tracking_id, "command")
        except HeldMailError as exc:
            results[tracking_id] = {"released": False, "reason": str(exc)}
            lines.append(f"{tracking_id}: not released: {exc}")
            continue
        results[tracking_id] = {
            "released": True,
            "delivered_to": list(done.delivered_to),
            "refused": list(done.refused),
            "next_hop_answer": done.next_hop_answer,
        }
        refused = f"; refused for good: {', '.join(done.refused)}" if done.refused else ""
        lines.append(
            f"{tracking_id}: released to {', '.join(done.delivered_to)}{refused} "
            f"(next hop: {done.next_hop_answer})"
        )
    print_report(args, {"results": results}, lines)
    return 0 if all(r["released"] for r in results.values()) else 1


# -- digest -------------------------------------------------------------------------------


@_guarded
def cmd_digest(args: argparse.Namespace) -> int:
    settings = _settings(args)
    q = settings.quarantine
    if not q.digest_from or (q.digest_to == "admin" and not q.digest_admin):
        raise ConfigError(
            "quarantine.digest_from",
            "a digest needs quarantine.digest_from (and digest_admin when digest_to is admin)",
        )
    quarantine = Quarantine(settings)
    now = time.time()
    mails = digest.compose(settings, digest.gather(quarantine, now, args.hours), now)
    if args.print:
        for mail in mails:
            sys.stdout.write(mail.raw.decode("ascii", "replace").replace("\r\n", "\n") + "\n")
        print(f"# {len(mails)} digest mail(s)", file=sys.stderr)
        return 0
    sent = asyncio.run(digest.send(quarantine, mails))
    print(f"sent {sent} of {len(mails)} digest mail(s)")
    return 0 if sent == len(mails) else 1
