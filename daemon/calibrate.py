"""``mailweir calibrate``: cut-offs for a target false-positive rate from the site's history.

Every scored verdict in the window gets a label from what users said about it:

- its latest correction (``weir_feedback``) decides: "was wanted mail" makes it ham, "was spam"
  makes it spam, a confirmation keeps the verdict's own side;
- a message nobody corrected is taken to have been judged right: ham when it was filed ham,
  spam when it was filed suspect or spam (as ``store.reports`` counts misfiling).

Users report only some of their misfiled mail, so the rates below are lower bounds; the
proposals are only as good as the corrections behind them.  The spam cut-off proposed is the
lowest one at which the labelled ham judged spam stays within ``--target-fpr``; the suspect one
does the same for ``--suspect-fpr``.
"""

from __future__ import annotations

import argparse
import json
import time
from dataclasses import asdict, dataclass

import numpy as np
from sqlalchemy import Engine, func, select

from mailweir.daemon.command_args import db_argument, json_argument
from mailweir.daemon.settings import PolicySettings
from mailweir.model import evaluate
from mailweir.model.types import HAM, SPAM
from mailweir.store import ModelStore, schema

DAY = 86400.0
WANTED = "false_positive"  # store.verdicts.FeedbackKind: filed as spam, was wanted mail
UNWANTED = "false_negative"  # filed as ham, was spam
SPAM_SIDE = ("suspect", "spam")


@dataclass(frozen=True)
class History:
    """Scores and labels of the judged messages in the window, shape (m,) each."""

    scores: np.ndarray
    labels: np.ndarray
    corrected: int


@dataclass(frozen=True)
class Proposal:
    name: str
    cutoff: float
    false_positive_rate: float
    false_negative_rate: float
    false_positives: int
    false_negatives: int


def read_history(engine: Engine, since: float, until: float) -> History:
    """Every judged, scored verdict received in ``[since, until]`` with its implied label."""
    v, f = schema.verdict, schema.feedback
    latest = (
        select(func.max(f.c.id).label("id"))
        .where(f.c.tracking_id.is_not(None))
        .group_by(f.c.tracking_id)
        .subquery()
    )
    kinds = select(f.c.tracking_id, f.c.kind).join(latest, latest.c.id == f.c.id).subquery()
    query = (
        select(v.c.score, v.c.band, kinds.c.kind)
        .select_from(v.outerjoin(kinds, kinds.c.tracking_id == v.c.tracking_id))
        .where(
            v.c.received_at >= since,
            v.c.received_at <= until,
            v.c.score.is_not(None),
            v.c.band.in_(("ham", *SPAM_SIDE)),
        )
    )
    with engine.connect() as conn:
        rows = conn.execute(query).all()
    labels = [_label(band, kind) for _score, band, kind in rows]
    corrected = sum(kind in (WANTED, UNWANTED) for _s, _b, kind in rows)
    return History(
        np.array([float(score) for score, _b, _k in rows], dtype=np.float64),
        np.array(labels, dtype=np.int64),
        corrected,
    )


def _label(band: str, kind: str | None) -> int:
    if kind == WANTED:
        return HAM
    if kind == UNWANTED:
        return SPAM
    return SPAM if band in SPAM_SIDE else HAM


def proposal(name: str, history: History, cutoff: float) -> Proposal:
    rates = evaluate.error_rates(history.labels, history.scores, cutoff)
    return Proposal(
        name,
        cutoff,
        rates.false_positive_rate,
        rates.false_negative_rate,
        rates.false_positives,
        rates.false_negatives,
    )


def propose(
    history: History, target_fpr: float, suspect_fpr: float, current: PolicySettings
) -> list[Proposal]:
    """The cut-offs in force and those meeting each target, with the rates each would give."""
    found = [
        proposal("current suspect_threshold", history, current.suspect_threshold),
        proposal("current spam_threshold", history, current.spam_threshold),
    ]
    if (history.labels == HAM).any() and (history.labels == SPAM).any():
        for name, target in (("suspect_threshold", suspect_fpr), ("spam_threshold", target_fpr)):
            cut = evaluate.cutoff_for_false_positive_rate(history.labels, history.scores, target)
            if not np.isfinite(cut):  # the top score is ham: just above it, nothing else spam
                cut = float(np.nextafter(history.scores.max(), np.inf))
            found.append(proposal(f"proposed {name}", history, cut))
    return found


def cmd_calibrate(args: argparse.Namespace) -> int:
    now = time.time() if args.now is None else args.now
    store = ModelStore.open(args.db, create=False)
    try:
        history = read_history(store.engine, now - args.days * DAY, now)
    finally:
        store.close()
    current = PolicySettings(
        suspect_threshold=args.suspect_threshold, spam_threshold=args.spam_threshold
    )
    found = propose(history, args.target_fpr, args.suspect_fpr, current)
    ham = int((history.labels == HAM).sum())
    report: dict[str, object] = {
        "days": args.days,
        "messages": len(history.labels),
        "ham": ham,
        "spam": len(history.labels) - ham,
        "corrected": history.corrected,
        "target_false_positive_rate": args.target_fpr,
        "suspect_false_positive_rate": args.suspect_fpr,
        "smallest_measurable_false_positive_rate": 1.0 / ham if ham else None,
        "proposals": [asdict(p) for p in found],
    }
    if args.json:
        print(json.dumps(report, indent=2, sort_keys=True))
    else:
        print("\n".join(_lines(report, found)))
    return 0 if len(found) > 2 else 1


def _lines(report: dict[str, object], found: list[Proposal]) -> list[str]:
    lines = [
        f"{report['messages']} judged messages in the last {report['days']:g} days: "
        f"{report['ham']} ham, {report['spam']} spam ({report['corrected']} corrected by users)",
        f"{'':<24} {'cut-off':>9} {'FP rate':>9} {'FN rate':>9} {'FP':>6} {'FN':>6}",
    ]
    for p in found:
        lines.append(
            f"{p.name:<24} {p.cutoff:>9.6f} {p.false_positive_rate:>9.4%} "
            f"{p.false_negative_rate:>9.4%} {p.false_positives:>6} {p.false_negatives:>6}"
        )
    if len(found) == 2:
        lines.append("no proposal: the history needs both ham and spam messages")
    elif report["smallest_measurable_false_positive_rate"] is not None:
        smallest = float(report["smallest_measurable_false_positive_rate"])  # type: ignore[arg-type]
        if smallest > float(report["target_false_positive_rate"]):  # type: ignore[arg-type]
            lines.append(
                f"caution: with {report['ham']} ham the smallest false-positive rate this "
                f"history can show is {smallest:.4%}, above the target"
            )
    lines.append("rates are lower bounds: uncorrected messages count as judged right")
    return lines


def add_command(sub: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    """Register ``mailweir calibrate``."""

    policy = PolicySettings()
    parser = sub.add_parser(
        "calibrate",
        help="propose cut-offs from the site's own feedback history",
        description="Label the recent verdicts with the corrections users sent and propose the "
        "suspect and spam cut-offs that meet target false-positive rates, with the rates each "
        "cut-off would have given.",
    )
    parser.add_argument("--days", type=float, default=90.0, help="history window (default 90)")
    parser.add_argument("--target-fpr", type=float, default=0.001, help="for the spam cut-off")
    parser.add_argument("--suspect-fpr", type=float, default=0.01, help="for the suspect cut-off")
    parser.add_argument("--suspect-threshold", type=float, default=policy.suspect_threshold)
    parser.add_argument("--spam-threshold", type=float, default=policy.spam_threshold)
    parser.add_argument("--now", type=float, default=None, help=argparse.SUPPRESS)
    db_argument(parser)
    json_argument(parser)
    parser.set_defaults(handler=cmd_calibrate)
