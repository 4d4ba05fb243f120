"""Band + policy -> what happens.  The safety rules come from issue 3 and DESIGN.md."""

from __future__ import annotations

import itertools

import pytest

from mailweir.daemon import actions
from mailweir.daemon.settings import PolicySettings

BANDS = ["ham", "suspect", "spam", "unjudged", "failed"]
ACTIONS = ["pass", "tag", "reroute", "reject"]
RAW = b"Mailweir-Verdict: ham\r\nSubject: Vaccine order\r\n\r\nBody\r\n"


def enforce(**changes: object) -> PolicySettings:
    return PolicySettings(
        mode="enforce",
        quarantine_mailbox="quarantine@harbourlane.example",
        subject_prefix="[SPAM]",
        **changes,
    )


@pytest.mark.parametrize(("band", "action"), list(itertools.product(BANDS, ACTIONS)))
def test_observe_mode_never_changes_or_stops_a_message(band, action):
    policy = PolicySettings(
        mode="observe",
        position="before-queue",
        ham_action=action,
        suspect_action=action,
        spam_action=action,
        on_scoring_failure="tempfail",
        subject_prefix="[SPAM]",
        quarantine_mailbox="quarantine@harbourlane.example",
    )
    decision = actions.decide(band, policy)
    assert decision.action == "pass"
    assert actions.render(RAW, decision, [("Mailweir-Verdict", band)]) is RAW


@pytest.mark.parametrize("band", ["unjudged", "failed"])
@pytest.mark.parametrize("action", ["reroute", "reject"])
def test_unjudged_and_failed_are_never_rerouted_or_rejected(band, action):
    policy = enforce(
        position="before-queue", ham_action=action, suspect_action=action, spam_action=action
    )
    assert actions.decide(band, policy).action not in ("reroute", "reject")


def test_unjudged_is_marked_without_subject_prefix():
    decision = actions.decide("unjudged", enforce(spam_action="reject"))
    assert (decision.action, decision.add_fields, decision.subject_prefix) == ("tag", True, "")


def test_failed_passes_untagged_by_default():
    decision = actions.decide("failed", enforce())
    assert (decision.action, decision.add_fields) == ("pass", False)


def test_failed_tempfails_when_configured():
    assert actions.decide("failed", enforce(on_scoring_failure="tempfail")).action == "tempfail"


def test_reject_acts_only_before_the_queue():
    assert (
        actions.decide("spam", enforce(spam_action="reject", position="before-queue")).action
        == "reject"
    )
    after = actions.decide("spam", enforce(spam_action="reject", position="after-queue"))
    assert (after.action, after.configured, after.subject_prefix) == ("tag", "reject", "[SPAM]")
    assert "before-queue" in after.note


def test_reroute_without_quarantine_mailbox_tags_instead():
    policy = PolicySettings(mode="enforce", spam_action="reroute")
    assert actions.decide("spam", policy).action == "tag"


def test_reroute_adds_fields_without_subject_prefix():
    decision = actions.decide("spam", enforce(spam_action="reroute"))
    assert (decision.action, decision.add_fields, decision.subject_prefix) == ("reroute", True, "")


@pytest.mark.parametrize(("band", "prefixed"), [("ham", False), ("suspect", True), ("spam", True)])
def test_tag_prefixes_subject_only_for_unwanted_bands(band, prefixed):
    policy = enforce(ham_action="tag", suspect_action="tag", spam_action="tag")
    assert bool(actions.decide(band, policy).subject_prefix) is prefixed


def test_pass_strips_forged_fields_and_adds_nothing():
    decision = actions.decide("ham", enforce())
    assert actions.render(RAW, decision, [("Mailweir-Verdict", "ham")]) == (
        b"Subject: Vaccine order\r\n\r\nBody\r\n"
    )


def test_tag_fields_in_order_with_score_to_four_places():
    fields = actions.tag_fields("spam", 0.998765, "0123abcd", [("cheap", 2.0)], ["a@h.example"])
    assert fields == [
        ("Mailweir-Verdict", "spam"),
        ("Mailweir-Score", "0.9988"),
        ("Mailweir-Id", "0123abcd"),
        ("Mailweir-Evidence", "+2.00 cheap"),
        ("Mailweir-Original-Recipients", "a@h.example"),
    ]


def test_tag_fields_omit_missing_score_and_evidence():
    assert actions.tag_fields("unjudged", None, "id1", ()) == [
        ("Mailweir-Verdict", "unjudged"),
        ("Mailweir-Id", "id1"),
    ]
