"""One decision for several recipients, and for listed senders (daemon/actions.py)."""

from __future__ import annotations

from dataclasses import replace

from mailweir.daemon import actions, replies
from mailweir.daemon.settings import PolicySettings, RecipientPolicy
from mailweir.daemon.site_policy import ListHit, SitePolicy

BASE = PolicySettings(
    mode="enforce",
    position="before-queue",
    quarantine_mailbox="quarantine@harbourlane.example",
    suspect_action="tag",
    spam_action="reject",
    subject_prefix="[SPAM]",
    recipient=(
        RecipientPolicy("tobias.lindqvist@harbourlane.example", spam_action="reroute"),
        RecipientPolicy("@lists.harbourlane.example", spam_threshold=0.999),
    ),
)
SITE = SitePolicy(BASE)
MAREN = SITE.recipient_view("maren.okafor@harbourlane.example")
TOBIAS = SITE.recipient_view("tobias.lindqvist@harbourlane.example")
LISTS = SITE.recipient_view("vets@lists.harbourlane.example")
ABUSE = SITE.recipient_view("abuse@harbourlane.example")
BLOCKED = ListHit("block", "policy.block_senders", "@offers.mail.example")


def test_decide_for_recipients_single_is_the_plain_decision() -> None:
    assert actions.decide_for_recipients("spam", 0.99, [MAREN], BASE) == actions.decide(
        "spam", BASE
    )


def test_decide_for_recipients_all_stopping_takes_the_gentler() -> None:
    decision = actions.decide_for_recipients("spam", 0.99, [MAREN, TOBIAS], BASE)
    assert decision.action == "reroute"  # reject for Maren, reroute for Tobias


def test_decide_for_recipients_one_passing_recipient_delivers_tagged() -> None:
    decision = actions.decide_for_recipients("spam", 0.995, [MAREN, LISTS], BASE)
    assert (decision.action, decision.band, decision.subject_prefix) == ("tag", "spam", "[SPAM]")
    assert decision.note


def test_decide_for_recipients_exempt_never_stops() -> None:
    assert actions.decide_for_recipients("spam", 0.99, [ABUSE], BASE).action == "tag"
    assert actions.decide_for_recipients("spam", 0.99, [ABUSE, MAREN], BASE).action == "tag"


def test_decide_for_recipients_all_pass_stays_pass() -> None:
    decision = actions.decide_for_recipients("ham", 0.01, [MAREN, LISTS, ABUSE], BASE)
    assert decision.action == "pass"


def test_decide_for_recipients_unscored_bands_use_the_plain_decision() -> None:
    assert actions.decide_for_recipients("unjudged", None, [ABUSE], BASE).action == "tag"
    assert actions.decide_for_recipients("failed", None, [MAREN], BASE).action == "pass"


def test_decide_listed_block_actions_and_exemption() -> None:
    reject = actions.decide_listed(BLOCKED, replace(BASE, block_action="reject"), False)
    assert (reject.action, reject.band, reject.verdict) == ("reject", "listed", "sender-blocked")
    assert actions.refusal(reject) is replies.SENDER_REFUSED
    spared = actions.decide_listed(BLOCKED, replace(BASE, block_action="reject"), True)
    assert (spared.action, spared.note) == ("tag", "exempt recipient")


def test_decide_listed_reject_after_queue_is_tagged() -> None:
    after = replace(BASE, position="after-queue", block_action="reject")
    assert actions.decide_listed(BLOCKED, after, False).action == "tag"


def test_decide_listed_observe_passes_and_keeps_the_hit() -> None:
    observe = replace(BASE, mode="observe", block_action="reject")
    decision = actions.decide_listed(BLOCKED, observe, False)
    assert (decision.action, decision.configured, decision.listed) == ("pass", "reject", BLOCKED)
    assert not decision.strip_own_fields


def test_decide_listed_allow_tags_without_prefix() -> None:
    allowed = ListHit("allow", "policy.allow_networks", "192.0.2.0/24")
    decision = actions.decide_listed(allowed, BASE, False)
    assert (decision.action, decision.subject_prefix, decision.verdict) == (
        "tag", "", "sender-allowed",
    )  # fmt: skip
