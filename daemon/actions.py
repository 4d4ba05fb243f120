"""From a judged band and the policy to what happens to the message.

The rules that keep mail safe live here, in one place:

- observe mode never changes or stops a message (nothing stripped, nothing added);
- ``reject`` only acts in position ``before-queue``: behind the queue a refusal makes the
  upstream server bounce mail it already accepted, so there the message is tagged instead;
- ``unjudged`` (the cold-start guard) and ``failed`` bands are never rerouted or rejected; an
  unjudged message is marked as such, a failed one passes untagged or, by setting, is
  temporarily refused (451) so the upstream retries.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import Literal

from mailweir.daemon import headers
from mailweir.daemon.settings import PolicySettings

Outcome = Literal["pass", "tag", "reroute", "reject", "tempfail"]

VERDICT_FIELD = "Mailweir-Verdict"
SCORE_FIELD = "Mailweir-Score"
ID_FIELD = "Mailweir-Id"
EVIDENCE_FIELD = "Mailweir-Evidence"
ORIGINAL_RECIPIENTS_FIELD = "Mailweir-Original-Recipients"


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


def decide(band: str, policy: PolicySettings) -> Decision:
    """The decision for a judged ``band`` under ``policy``."""
    configured = _configured(band, policy)
    if policy.mode == "observe":
        return Decision("pass", configured, strip_own_fields=False, note="observe mode")
    if band == "failed":
        return Decision(configured, configured)
    if band == "unjudged":
        return Decision("tag", "tag", add_fields=True, note="model not yet trained enough")
    if configured == "reject" and policy.position != "before-queue":
        return _tag(band, policy, configured, "reject needs position before-queue")
    if configured == "reroute" and not policy.quarantine_mailbox:
        return _tag(band, policy, configured, "no quarantine mailbox configured")
    if configured == "tag":
        return _tag(band, policy, configured)
    return Decision(configured, configured, add_fields=configured == "reroute")


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
    return Decision("tag", configured, add_fields=True, subject_prefix=prefix, note=note)


def tag_fields(
    band: str,
    score: float | None,
    tracking_id: str,
    evidence: Sequence[tuple[str, float]],
    original_recipients: Sequence[str] = (),
) -> list[tuple[str, str]]:
    """Our header fields, in the order they go on top of the message."""
    fields = [(VERDICT_FIELD, band)]
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
