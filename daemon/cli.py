"""The ``mailweir`` command line: one plain verb per job.

Every command that prints a report also takes ``--json`` for scripts, and ``--db`` to point at
a database URL or SQLite path.
"""

from __future__ import annotations

import argparse
import sys
from collections.abc import Callable, Sequence
from pathlib import Path

from mailweir.daemon import (
    calibrate,
    check,
    exchange_commands,
    learning,
    margin,
    quarantine_commands,
    upkeep,
)
from mailweir.daemon.command_args import db_argument, json_argument, print_report
from mailweir.daemon.settings import PolicySettings, UpkeepSettings
from mailweir.daemon.sources import SourceError, read_corpus
from mailweir.model.hashing import token_hash
from mailweir.model.types import HAM, SPAM

Handler = Callable[[argparse.Namespace], int]


# -- train / untrain ----------------------------------------------------------------------


def cmd_train(args: argparse.Namespace) -> int:
    label = SPAM if args.spam else HAM
    model = learning.open_model(
        args.db, bigrams=args.bigrams, method=args.method, margin=args.margin
    )
    try:
        progress = learning.Progress("trained", None if not args.json else False)
        summary = learning.train_from(
            model, args.sources, label, source=args.source, progress=progress, workers=args.workers
        )
        seconds = progress.done()
    finally:
        model.close()
    return _summary(args, "train", summary, seconds)


def cmd_untrain(args: argparse.Namespace) -> int:
    model = learning.open_model(args.db)
    try:
        progress = learning.Progress("untrained", None if not args.json else False)
        summary = learning.untrain_from(model, args.sources, progress)
        seconds = progress.done()
    finally:
        model.close()
    return _summary(args, "untrain", summary, seconds)


def _summary(args: argparse.Namespace, verb: str, summary: dict[str, int], seconds: float) -> int:
    total = sum(n for k, n in summary.items() if k != "unreadable")
    report: dict[str, object] = {
        "command": verb,
        "messages": total,
        "seconds": round(seconds, 3),
        "messages_per_second": round(total / seconds, 1) if seconds > 0 else None,
        **{k: v for k, v in sorted(summary.items())},
    }
    lines = [f"{verb}: {total} messages in {seconds:.1f} s"]
    lines += [f"  {key.replace('_', ' ')}: {value}" for key, value in sorted(summary.items())]
    print_report(args, report, lines)
    return 1 if summary.get("unreadable") and total == 0 else 0


def _add_learning_commands(sub: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    train = sub.add_parser(
        "train",
        help="learn messages as spam or ham",
        description="Learn messages from mbox files, Maildir folders, folders of .eml files, "
        "single files or standard input (-). A message trained before is skipped; one trained "
        "the other way is moved. By default a message the model already judges right with at "
        "least the model's training margin (log-odds, 10 unless set when the model was made) "
        "is not trained and is counted as confident.",
    )
    kind = train.add_mutually_exclusive_group(required=True)
    kind.add_argument("--spam", action="store_true", help="the messages are spam")
    kind.add_argument("--ham", action="store_true", help="the messages are wanted mail")
    train.add_argument("sources", nargs="+", help="files, folders, mboxes, Maildirs or -")
    train.add_argument("--source", default="import", help="label for the ledger (default import)")
    train.add_argument(
        "--bigrams",
        action=argparse.BooleanOptionalAction,
        default=None,
        help="word pairs (adjacent words) beside the words; fixed when a model is created",
    )
    train.add_argument("--method", help="scoring method to stamp on a new model")
    train.add_argument(
        "--workers",
        type=_worker_count,
        default=None,
        metavar="N",
        help="processes that tokenize ahead of training (default: one per core, at most "
        f"{learning.MAX_WORKERS}; 1 on a machine busy with other work)",
    )
    _margin_arguments(train, learning.STAMPED, "the model's own, stamped when it was made")
    db_argument(train)
    json_argument(train)
    train.set_defaults(handler=cmd_train)

    untrain = sub.add_parser(
        "untrain",
        help="forget messages learned earlier",
        description="Remove messages from the counts; exact inverse of train.",
    )
    untrain.add_argument("sources", nargs="+", help="files, folders, mboxes, Maildirs or -")
    db_argument(untrain)
    json_argument(untrain)
    untrain.set_defaults(handler=cmd_untrain)


def _worker_count(text: str) -> int:
    try:
        count = int(text)
    except ValueError:
        count = 0
    if count < 1:
        raise argparse.ArgumentTypeError(f"expected a whole number of processes >= 1, got {text!r}")
    return count


def _margin_value(text: str) -> float | None:
    try:
        return margin.parse_margin(text)
    except ValueError as exc:
        raise argparse.ArgumentTypeError(str(exc)) from None


def _margin_arguments(parser: argparse.ArgumentParser, default: object, what: str) -> None:
    group = parser.add_mutually_exclusive_group()
    group.add_argument(
        "--margin",
        type=_margin_value,
        default=default,
        metavar="LOGODDS",
        help="train only messages misjudged or judged with less than this log-odds margin "
        f"(default: {what}); on a new model it becomes the model's own",
    )
    group.add_argument(
        "--every-message",
        dest="margin",
        action="store_const",
        const=None,
        help="train every message, however sure the model already is",
    )


# -- score --------------------------------------------------------------------------------


def cmd_score(args: argparse.Namespace) -> int:
    raw = sys.stdin.buffer.read() if args.message == "-" else Path(args.message).read_bytes()
    model = learning.open_model(args.db)
    try:
        score, words = learning.score_message(model, raw, args.explain)
        classes = model.store.class_count()
    finally:
        model.close()
    text = {token_hash(w): w for w in words}
    p = score.spam_probability
    band = (
        "spam" if p >= args.spam_threshold else "suspect" if p >= args.suspect_threshold else "ham"
    )
    evidence = [
        {"token": text.get(e.token_hash, f"#{e.token_hash:x}"), "weight": round(e.weight, 4)}
        for e in score.evidence
    ]
    report = {
        "message": args.message,
        "spam_probability": p,
        "band": band,
        "method": model.scorer.name,
        "suspect_threshold": args.suspect_threshold,
        "spam_threshold": args.spam_threshold,
        "trained_ham": int(classes[HAM]),
        "trained_spam": int(classes[SPAM]),
        "evidence": evidence,
    }
    lines = [
        f"{args.message}: {band} (spam probability {p:.4f}, method {model.scorer.name})",
        f"  cut-offs: suspect {args.suspect_threshold:g}, spam {args.spam_threshold:g}; "
        f"trained on {classes[HAM]} ham and {classes[SPAM]} spam",
    ]
    for side, sign in (("toward spam", 1), ("toward ham", -1)):
        picked = [e for e in evidence if sign * float(e["weight"]) > 0]  # type: ignore[arg-type]
        if picked:
            lines.append(f"  {side}:")
            lines += [f"    {e['weight']:+8.3f}  {e['token']}" for e in picked]
    print_report(args, report, lines)
    return 0


def _add_score_command(sub: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    policy = PolicySettings()
    score = sub.add_parser(
        "score",
        help="score one message and explain the verdict",
        description="Print the spam probability, the band at the cut-offs and the tokens that "
        "pushed hardest each way.",
    )
    score.add_argument("message", help="a message file, or - for standard input")
    score.add_argument("--suspect-threshold", type=float, default=policy.suspect_threshold)
    score.add_argument("--spam-threshold", type=float, default=policy.spam_threshold)
    score.add_argument("--explain", type=int, default=8, help="tokens to show each way")
    db_argument(score)
    json_argument(score)
    score.set_defaults(handler=cmd_score)


# -- replay -------------------------------------------------------------------------------


def cmd_replay(args: argparse.Namespace) -> int:
    from mailweir.daemon import replay

    corpus = read_corpus(args.corpus)
    if args.limit:
        corpus = corpus[: args.limit]
    plan = replay.ReplayPlan(
        methods=args.method or [learning.DEFAULT_METHOD],
        protocol=args.protocol,
        train_fraction=args.train_fraction,
        bigrams=args.bigrams,
        ignore_headers=tuple(p.lower() for p in args.ignore_header),
        database=args.replay_db,
        train_margin=args.margin,
    )
    progress = learning.Progress("replayed", None if not args.json else False)
    result = replay.replay(corpus, plan, progress=progress)
    for item in result.results:
        item.warmup = min(args.warmup, len(item.labels) - 1)
    cutoffs = args.cutoff or [PolicySettings().suspect_threshold, PolicySettings().spam_threshold]
    figures = [item.figures(cutoffs, args.target_fpr) for item in result.results]
    if args.scores:
        replay.write_scores(Path(args.scores), result.results[0], max(cutoffs))
    if args.roc:
        replay.write_roc(Path(args.roc), result.results)
    report: dict[str, object] = {
        "corpus": args.corpus,
        "protocol": args.protocol,
        "messages": len(corpus),
        "trained": result.trained,
        "seconds": round(result.seconds, 2),
        "messages_per_second": round(len(corpus) / max(result.seconds, 1e-9), 1),
        "tokens": result.tokens,
        "database_bytes": result.database_bytes,
        "bigrams": args.bigrams,
        "train_margin": args.margin,
        "warmup": args.warmup,
        "methods": figures,
    }
    print_report(args, report, _replay_lines(report, figures))
    return 0


def _replay_lines(report: dict[str, object], figures: list[dict[str, object]]) -> list[str]:
    lines = [
        f"replay ({report['protocol']}) of {report['messages']} messages from {report['corpus']}:"
        f" {report['seconds']} s, {report['messages_per_second']} msg/s, "
        f"{report['tokens']} tokens, {report['database_bytes']} database bytes",
        f"{'method':<12} {'(1-AUC)%':>9} {'caught@tgt':>10} {'cutoff@tgt':>10}  at cut-offs",
    ]
    for f in figures:
        at = "; ".join(
            f"{c}: FP {r['false_positive_rate']:.4%} FN {r['false_negative_rate']:.4%}"  # type: ignore[index]
            for c, r in f["at_cutoffs"].items()  # type: ignore[attr-defined]
        )
        lines.append(
            f"{f['method']:<12} {f['one_minus_auc_percent']:>9.4f} "
            f"{f['spam_caught_at_target']:>10.2%} {f['cutoff_for_target']:>10.6f}  {at}"
        )
    target = figures[0]["target_false_positive_rate"] if figures else 0
    lines.append(
        f"(target false-positive rate {target:g}; figures skip the first "
        f"{report['warmup']} messages)"
    )
    return lines


def _add_replay_command(sub: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    rp = sub.add_parser(
        "replay",
        help="measure a model on a labelled corpus",
        description="Replay a corpus (a folder or .tar.gz with ham/ and spam/, ordered by "
        "index.tsv when present) and print ROC AUC, (1-AUC)%%, error rates at the cut-offs and "
        "the cut-off for a target false-positive rate.",
    )
    rp.add_argument("corpus", help="folder or .tar.gz holding ham/ and spam/")
    rp.add_argument(
        "--method",
        action="append",
        choices=("bernoulli", "multinomial", "fisher"),
        help="scoring method; repeat to compare several in one pass",
    )
    rp.add_argument("--protocol", choices=("online", "split"), default="online")
    rp.add_argument("--train-fraction", type=float, default=0.5, help="for --protocol split")
    rp.add_argument("--bigrams", action=argparse.BooleanOptionalAction, default=False)
    rp.add_argument(
        "--ignore-header",
        action="append",
        default=[],
        metavar="PREFIX",
        help="drop header fields whose name starts with PREFIX before tokenizing (repeatable)",
    )
    _margin_arguments(rp, margin.DEFAULT_TRAIN_MARGIN, "as mailweir train on a new model")
    rp.add_argument("--cutoff", type=float, action="append", help="cut-offs to report")
    rp.add_argument("--target-fpr", type=float, default=0.001)
    rp.add_argument("--warmup", type=int, default=0, help="leave the first N out of figures")
    rp.add_argument("--limit", type=int, default=0, help="replay only the first N messages")
    rp.add_argument("--scores", help="write file, label, score, verdict per message (TSV)")
    rp.add_argument("--roc", help="write the ROC curve as an SVG image")
    rp.add_argument("--replay-db", help="keep the replay's model in this database")
    json_argument(rp)
    rp.set_defaults(handler=cmd_replay)


# -- stats / prune ------------------------------------------------------------------------


def cmd_stats(args: argparse.Namespace) -> int:
    model = learning.open_model(args.db)
    try:
        stats = model.store.stats()
    finally:
        model.close()
    report = dict(vars(stats))
    report["bytes_per_token"] = (
        round(stats.database_bytes / stats.tokens, 1) if stats.tokens else None
    )
    report["train_margin"] = margin.margin_text(model.margin)
    report["token_kinds"] = learning.token_kinds(model.options)
    lines = [f"{key.replace('_', ' ')}: {value}" for key, value in report.items()]
    print_report(args, report, lines)
    return 0


def cmd_prune(args: argparse.Namespace) -> int:
    model = learning.open_model(args.db)
    try:
        before = model.store.stats().tokens
        removed = model.store.prune(max_count=args.max_count, unseen_days=args.unseen_days)
    finally:
        model.close()
    report = {"tokens_before": before, "removed": removed, "tokens_after": before - removed}
    lines = [
        f"pruned {removed} of {before} tokens "
        f"(seen in at most {args.max_count} messages, unseen for {args.unseen_days} days)"
    ]
    print_report(args, report, lines)
    return 0


def _add_model_commands(sub: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    stats = sub.add_parser(
        "stats",
        help="show model size and class totals",
        description="Print the model's size, class totals and settings.",
    )
    db_argument(stats)
    json_argument(stats)
    stats.set_defaults(handler=cmd_stats)
    prune = sub.add_parser(
        "prune",
        help="drop rare tokens not seen for a while",
        description="Delete tokens seen in few messages and not seen recently; they carry "
        "little evidence and most of the rows.",
    )
    # The daemon's scheduled prune (upkeep.prune_*) and this command share their defaults.
    upkeep = UpkeepSettings()
    prune.add_argument(
        "--max-count",
        type=int,
        default=upkeep.prune_max_count,
        help="messages containing the token",
    )
    prune.add_argument("--unseen-days", type=int, default=upkeep.prune_unseen_days)
    db_argument(prune)
    json_argument(prune)
    prune.set_defaults(handler=cmd_prune)


# -- entry point --------------------------------------------------------------------------


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="mailweir",
        description="An SMTP content filter that learns spam from your own mail.",
    )
    sub = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")
    _add_run_command(sub)
    _add_demo_command(sub)
    _add_learning_commands(sub)
    _add_score_command(sub)
    _add_replay_command(sub)
    _add_model_commands(sub)
    exchange_commands.add_commands(sub)
    quarantine_commands.add_commands(sub)
    calibrate.add_command(sub)
    upkeep.add_command(sub)
    check.add_command(sub)
    return parser


def _add_run_command(sub: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    from mailweir.daemon import service

    run = sub.add_parser(
        "run",
        help="run the filter daemon",
        description="Start the SMTP filter from a TOML configuration file.",
    )
    service.add_run_arguments(run)
    run.set_defaults(handler=service.run_command)


def _add_demo_command(sub: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    from mailweir.daemon import demo

    parser = sub.add_parser(
        "demo",
        help="run the Harbour Lane demo on 127.0.0.1",
        description="Train a model on an invented practice's mail, start the daemon with a "
        "local next hop writing Maildirs, push a morning's mail through and show the verdicts.",
    )
    demo.add_demo_arguments(parser)
    parser.set_defaults(handler=demo.demo_command)


def main(argv: Sequence[str] | None = None) -> int:
    args = build_parser().parse_args(argv)
    handler: Handler = args.handler
    try:
        return handler(args)
    except (SourceError, learning.ModelMismatch, ValueError) as exc:
        print(f"mailweir: {exc}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        return 130


if __name__ == "__main__":
    sys.exit(main())
