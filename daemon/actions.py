"""From a judged band and the policy to what happens to the message.

The rules that keep mail safe live here, in one place:

- observe mode never changes or stops a message (nothing stripped, nothing added);
- ``reject`` only acts in position ``before-queue``: behind the queue a refusal makes the
  upstream server bounce mail it already accepted, so there the message is tagged instead;
- ``unjudged`` (the cold-start guard) and ``failed`` bands are never rerouted or rejected; an
  unjudged message is marked as such, a failed one passes untagged or, by setting, is
  temporarily refused (451) so the upstream retries;
- a message for an exempt role mailbox (``policy.exempt_local_parts``) is never rerouted or
  rejected, only tagged.

Site policy (daemon/site_policy.py) comes first.  A sender on a list is not scored: an allowed
message is tagged ``sender-allowed``, a blocked one gets ``policy.block_action``
(``sender-blocked``); both are recorded with band ``listed``.

Several recipients in one transaction: SMTP gives one reply to the end of DATA for all of
them (RFC 5321 section 4.1.1.4), and splitting the message would take a second next-hop
transaction whose failure after the first succeeded could only be answered by a retry of both.
So each recipient's own decision is worked out (its ``[[policy.recipient]]`` cut-offs and
actions, exemption) and one decision taken for all:

- they agree: that decision;
- every one of them would reroute or reject: the gentler of the two (reroute, so the mail is
  still held for whoever would have rerouted it);
- otherwise the message is delivered to all of them, tagged when any recipient's decision
  marks it (with the highest band among those), so nobody loses mail their own policy passes.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Literal

from mailweir.daemon import headers, replies
from mailweir.daemon.judge import band_for
from mailweir.daemon.replies import Reply
from mailweir.daemon.settings import PolicySettings
from mailweir.daemon.site_policy import ListHit, RecipientView

Outcome = Literal["pass", "tag", "reroute", "reject", "tempfail"]

VERDICT_FIELD = "Mailweir-Verdict"
SCORE_FIELD = "Mailweir-Score"
ID_FIELD = "Mailweir-Id"
EVIDENCE_FIELD = "Mailweir-Evidence"
ORIGINAL_RECIPIENTS_FIELD = "Mailweir-Original-Recipients"
LISTED_FIELD = "Mailweir-Listed"  # which list key and entry decided, e.g. "policy.allow_senders @x"
LISTED_BAND = "listed"  # the verdict log's band for a message the sender lists decided
LISTED_VERDICT = {"allow": "sender-allowed", "block": "sender-blocked"}
SCORE_BANDS = ("ham", "suspect", "spam")
STOPPING: tuple[Outcome, ...] = ("reroute", "reject")  # gentler first


@dataclass(frozen=True)
class Decision:
    """What to do with one message.

    ``configured`` is the action the policy names for the band (what enforce mode would do);
    ``action`` is what actually happens; ``note`` says why they differ, when they do.
    """

    action: Outcome
    configured: Outcome
    add_fields: bool = False
    subject_prefix: str = ""
    strip_own_fields: bool = True
    note: str = ""
    band: str = ""  # the band recorded and shown; a recipient's own cut-offs may move it
    listed: ListHit | None = None  # set when a sender list decided, not the score

    @property
    def verdict(self) -> str:
        """The ``Mailweir-Verdict`` value."""
        return LISTED_VERDICT[self.listed.list] if self.listed else self.band


def decide(band: str, policy: PolicySettings) -> Decision:
    """The decision for a judged ``band`` under ``policy``."""
    configured = _configured(band, policy)
    if policy.mode == "observe":
        return Decision("pass", configured, strip_own_fields=False, note="observe mode", band=band)
    if band == "failed":
        return Decision(configured, configured, band=band)
    if band == "unjudged":
        note = "model not yet trained enough"
        return Decision("tag", "tag", add_fields=True, note=note, band=band)
    return _carry_out(band, policy, configured)


def decide_for_recipients(
    band: str, score: float | None, views: Sequence[RecipientView], policy: PolicySettings
) -> Decision:
    """One decision for a judged message and all its recipients (see the module docstring)."""
    if score is None or band not in SCORE_BANDS or not views:
        return decide(band, policy)
    each = [_for_recipient(band, score, view) for view in views]
    first = each[0]
    if all(d == first for d in each):
        return first
    if all(d.action in STOPPING for d in each):
        return min(each, key=lambda d: STOPPING.index(d.action))
    marked = [d for d in each if d.action != "pass"]
    if not marked:
        return first
    top = max(marked, key=lambda d: SCORE_BANDS.index(d.band))
    return _tag(top.band, policy, top.configured, top.note or "recipients' policies differ")


def decide_listed(hit: ListHit, policy: PolicySettings, exempt: bool) -> Decision:
    """The decision for a sender on a list; ``exempt``: a recipient is an exempt mailbox."""
    configured: Outcome = "tag" if hit.list == "allow" else policy.block_action
    if policy.mode == "observe":
        return Decision(
            "pass",
            configured,
            strip_own_fields=False,
            note="observe mode",
            band=LISTED_BAND,
            listed=hit,
        )
    if hit.list == "allow":
        return Decision("tag", "tag", add_fields=True, band=LISTED_BAND, listed=hit)
    if exempt and configured in STOPPING:
        decision = _tag("spam", policy, configured, "exempt recipient")
    else:
        decision = _carry_out("spam", policy, configured)
    return dataclasses.replace(decision, band=LISTED_BAND, listed=hit)


def refusal(decision: Decision) -> Reply:
    """The 5xx for a ``reject`` decision."""
    return replies.SENDER_REFUSED if decision.listed else replies.REJECTED_AS_SPAM


def _for_recipient(band: str, score: float, view: RecipientView) -> Decision:
    # The judge placed the score by [policy]'s cut-offs; a recipient rule places it anew.
    own = band_for(score, view.policy) if view.rule else band
    decision = decide(own, view.policy)
    if view.exempt and decision.action in STOPPING:
        return _tag(own, view.policy, decision.configured, "exempt recipient")
    return decision


def _carry_out(band: str, policy: PolicySettings, configured: Outcome) -> Decision:
    """Enforce mode: the configured action, or a tag where it cannot be carried out."""
    if configured == "reject" and policy.position != "before-queue":
        return _tag(band, policy, configured, "reject needs position before-queue")
    if configured == "reroute" and not policy.quarantine_mailbox:
        return _tag(band, policy, configured, "no quarantine mailbox configured")
    if configured == "tag":
        return _tag(band, policy, configured)
    return Decision(configured, configured, add_fields=configured == "reroute", band=band)


def _configured(band: str, policy: PolicySettings) -> Outcome:
    if band == "failed":
        return "tempfail" if policy.on_scoring_failure == "tempfail" else "pass"
    if band == "unjudged":
        return "tag"
    action: Outcome = {
        "ham": policy.ham_action,
        "suspect": policy.suspect_action,
        "spam": policy.spam_action,
    }[band]
    return action


def _tag(band: str, policy: PolicySettings, configured: Outcome, note: str = "") -> Decision:
    # The subject marker is for messages judged unwanted; a tagged ham keeps its subject.
    prefix = policy.subject_prefix if band in ("suspect", "spam") else ""
    return Decision("tag", configured, True, prefix, note=note, band=band)


def tag_fields(
    band: str,
    score: float | None,
    tracking_id: str,
    evidence: Sequence[tuple[str, float]],
    original_recipients: Sequence[str] = (),
    listed: ListHit | None = None,
) -> list[tuple[str, str]]:
    """Our header fields, in the order they go on top of the message.  ``band`` is the
    verdict's value (:attr:`Decision.verdict`)."""
    fields = [(VERDICT_FIELD, band)]
    if listed is not None:
        fields.append((LISTED_FIELD, str(listed)))
    if score is not None:
        fields.append((SCORE_FIELD, f"{score:.4f}"))
    fields.append((ID_FIELD, tracking_id))
    if evidence:
        fields.append((EVIDENCE_FIELD, headers.evidence_text(evidence)))
    if original_recipients:
        fields.append((ORIGINAL_RECIPIENTS_FIELD, ", ".join(original_recipients)))
    return fields


def render(
    raw: bytes,
    decision: Decision,
    fields: Sequence[tuple[str, str]],
) -> bytes:
    """The message as relayed: ``raw`` unchanged in observe mode, otherwise without incoming
    ``Mailweir-*`` fields and, when tagging or rerouting, with ``fields`` on top."""
    if not decision.strip_own_fields:
        return raw
    message = headers.remove_own_fields(raw)
    if decision.subject_prefix:
        message = headers.prefix_subject(message, decision.subject_prefix)
    if decision.add_fields:
        message = headers.prepend_fields(message, fields)
    return message
