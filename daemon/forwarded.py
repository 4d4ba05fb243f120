"""Finding the misfiled original inside a feedback message, however the user sent it back.

Four shapes, tried in this order:

``resent``
    Redirected or bounced (RFC 5322 section 3.6.6): the message *is* the original with
    ``Resent-*`` fields prepended.  Those fields are removed again, nothing else is touched.
``attachment``
    Forwarded as an attachment: a ``message/rfc822`` (or ``message/global``, RFC 6532) part,
    or a file named ``*.eml``.  Several attachments give several originals (a user may send
    a whole folder's worth at once), the shallowest first, in document order.
``inline``
    Forwarded inline: a "Forwarded message" / "Original Message" block in the text.  The
    quoted header lines (From, Date or Sent, Subject, To, ...) and the text below them are
    rebuilt into a plain-text message.  This is the lossy shape: the tracking id, when the
    block shows it, is what makes the retraining exact.
``itself``
    A message carrying our own ``Mailweir-Id`` field at the top but none of the above (a
    redirect by a server rule).  Feedback mail itself is never tagged by mailweir, so the
    field can only come from an original that passed through it.

Parsing reuses the model's bounded MIME walker and never raises on bad input.
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from typing import Final, Literal

from mailweir.daemon.actions import ID_FIELD
from mailweir.model.charsets import decode_bytes
from mailweir.model.html_text import drop_hidden_blocks, visible_text
from mailweir.model.mime import Part, parse_entity, split_multipart

Form = Literal["resent", "attachment", "inline", "itself"]

MAX_ORIGINALS: Final = 20  # originals taken from one feedback message
MAX_PARTS: Final = 200  # MIME entities examined
MAX_DEPTH: Final = 8
MAX_TEXT_BYTES: Final = 2 * 1024 * 1024  # decoded bytes of a text part searched for a block
MAX_QUOTED_FIELDS: Final = 30  # header lines read from an inline block
TRACKING_ID: Final = re.compile(r"[A-Za-z0-9_-]{1,64}")  # as the HTTP side accepts it

_ID_NAME: Final = ID_FIELD.lower()
# Separator lines mail programs write above an inline forward (from memory of what common
# clients produce; no source): "---------- Forwarded message ---------",
# "-------- Forwarded Message --------", "-----Original Message-----",
# "----- Forwarded message from Someone -----", "Begin forwarded message:".
_MARKER: Final = re.compile(
    r"(?im)^[ \t>]*(?:-{2,}[ \t]*(?:forwarded[ \t]+message|original[ \t]+message)\b[^\n]*"
    r"|begin[ \t]+forwarded[ \t]+message[ \t]*:)[ \t]*\r?$"
)
_QUOTED_FIELD: Final = re.compile(r"^\*?([A-Za-z][A-Za-z0-9-]{0,40})\*?[ \t]*:\*?[ \t]*(.*)$")
# Quoted names that mean a header field under another name (Outlook writes "Sent:").
_FIELD_NAMES: Final = {"sent": "Date", "date": "Date"}
_BLOCK_END_TAGS: Final = re.compile(r"(?i)<\s*(?:br|/p|/div|/tr|/h\d|hr|/li|/blockquote)\b[^>]*>")


@dataclass(frozen=True)
class Original:
    """One original found in a feedback message.

    ``raw`` is the original as well as it could be recovered (byte-exact for ``resent``,
    ``attachment`` and ``itself``; rebuilt for ``inline``).  ``tracking_id`` is the value of
    its ``Mailweir-Id`` field, when it shows one.
    """

    form: Form
    raw: bytes
    tracking_id: str | None


def find_originals(raw: bytes) -> list[Original]:
    """Every original in ``raw`` (at most ``MAX_ORIGINALS``); empty when none is recognised."""
    top = parse_entity(raw, 0, ())
    if any(name.startswith("resent-") for name, _ in top.fields):
        original = _without_resent_fields(raw)
        return [Original("resent", original, tracking_id(original))]
    attached = _attachments(top)
    if attached:
        return [Original("attachment", body, tracking_id(body)) for body in attached]
    inline = _inline(top)
    if inline is not None:
        return [inline]
    own = _id_value(top)
    if own is not None:
        return [Original("itself", raw, own)]
    return []


def tracking_id(raw: bytes) -> str | None:
    """The ``Mailweir-Id`` of a message's own header, when it has a well-formed one."""
    return _id_value(parse_entity(raw, 0, ()))


def _id_value(part: Part) -> str | None:
    value = part.field(_ID_NAME)
    if value is None:
        return None
    text = value.decode("ascii", "replace").strip()
    return text if TRACKING_ID.fullmatch(text) else None


# -- resent ----------------------------------------------------------------------------------


def _without_resent_fields(raw: bytes) -> bytes:
    """``raw`` minus its ``Resent-*`` fields (continuation lines included), byte for byte."""
    kept: list[bytes] = []
    position = 0
    dropping = False
    while position < len(raw):
        end = raw.find(b"\n", position)
        end = len(raw) if end < 0 else end + 1
        line = raw[position:end]
        if line in (b"\r\n", b"\n"):
            break  # the end of the header; the body follows untouched
        if line[:1] not in (b" ", b"\t"):
            dropping = line[:7].lower() == b"resent-"
        if not dropping:
            kept.append(line)
        position = end
    return b"".join(kept) + raw[position:]


# -- attachments -----------------------------------------------------------------------------


def _attachments(top: Part) -> list[bytes]:
    """Bodies of attached messages, breadth first (the user's attachments before anything
    attached inside them), in document order."""
    found: list[bytes] = []
    level = [top]
    seen = 1
    while level and len(found) < MAX_ORIGINALS:
        following: list[Part] = []
        for part in level:
            if part.content_type in ("message/rfc822", "message/global") or _is_eml(part):
                body = part.decoded_body(MAX_TEXT_BYTES * 32)[0]
                if body.strip():
                    found.append(body)
                continue
            if not part.content_type.startswith("multipart/") or part.depth >= MAX_DEPTH:
                continue
            boundary = part.params.get("boundary", "").encode("utf-8", "replace")[:200]
            if not boundary:
                continue
            bodies, _ = split_multipart(part.body, boundary, max(MAX_PARTS - seen, 0))
            seen += len(bodies)
            following.extend(parse_entity(body, part.depth + 1, ()) for body in bodies)
        level = following
    return found[:MAX_ORIGINALS]


def _is_eml(part: Part) -> bool:
    # Some clients attach a saved message as a plain file instead of message/rfc822.
    return part.filename.lower().endswith(".eml") and not part.content_type.startswith("multipart/")


# -- inline ----------------------------------------------------------------------------------


def _inline(top: Part) -> Original | None:
    for text in _texts(top):
        marker = _MARKER.search(text)
        if marker is None:
            continue
        lines = text[marker.end() :].replace("\r\n", "\n").split("\n")
        lines = _unquote(lines)
        fields, body = _quoted_block(lines)
        if not fields:
            continue
        return Original("inline", _rebuild(fields, body), _quoted_id(fields))
    return None


def _texts(top: Part) -> list[str]:
    """Decoded text of the body parts, plain text before HTML."""
    plain: list[str] = []
    html: list[str] = []
    stack = [top]
    seen = 0
    while stack and seen < MAX_PARTS:
        part = stack.pop(0)
        seen += 1
        kind = part.content_type
        if kind.startswith("multipart/") and part.depth < MAX_DEPTH:
            boundary = part.params.get("boundary", "").encode("utf-8", "replace")[:200]
            bodies, _ = split_multipart(part.body, boundary, MAX_PARTS) if boundary else ([], 0)
            stack.extend(parse_entity(body, part.depth + 1, ()) for body in bodies)
        elif kind in ("text/plain", "text/html") and part.disposition[0] != "attachment":
            data = part.decoded_body(MAX_TEXT_BYTES)[0]
            text = decode_bytes(data, part.params.get("charset", ""))[0]
            if kind == "text/plain":
                plain.append(text)
            else:
                html.append(_html_lines(text))
    return plain + html


def _html_lines(markup: str) -> str:
    """Visible text of HTML with line breaks kept where blocks end."""
    markup = drop_hidden_blocks(markup).replace("\r", "").replace("\n", " ")
    lines = visible_text(_BLOCK_END_TAGS.sub("\n", markup)).split("\n")
    return "\n".join(line.strip() for line in lines)


def _unquote(lines: list[str]) -> list[str]:
    """Drop one level of "> " quoting when every non-empty line carries it."""
    filled = [line for line in lines if line.strip()]
    if filled and all(line.lstrip().startswith(">") for line in filled):
        return [re.sub(r"^\s*> ?", "", line) for line in lines]
    return lines


def _quoted_block(lines: list[str]) -> tuple[list[tuple[str, str]], list[str]]:
    """The quoted header fields below the marker and the lines of text after them."""
    index = 0
    while index < len(lines) and not lines[index].strip():
        index += 1  # blank lines between the marker and the fields
    fields: list[tuple[str, str]] = []
    while index < len(lines) and len(fields) < MAX_QUOTED_FIELDS:
        line = lines[index]
        if not line.strip():
            break
        match = _QUOTED_FIELD.match(line.strip())
        if match is not None:
            fields.append((match.group(1), match.group(2).strip().strip("*").strip()))
        elif fields and line[:1] in (" ", "\t"):
            name, value = fields[-1]  # a folded (wrapped) field value
            fields[-1] = (name, f"{value} {line.strip()}")
        else:
            break
        index += 1
    return fields, lines[index:]


def _quoted_id(fields: list[tuple[str, str]]) -> str | None:
    for name, value in fields:
        if name.lower() == _ID_NAME and TRACKING_ID.fullmatch(value):
            return value
    return None


def _rebuild(fields: list[tuple[str, str]], body: list[str]) -> bytes:
    """A plain-text RFC 5322 message from the quoted fields and text."""
    head: list[str] = []
    for name, value in fields:
        if name.lower().startswith("mailweir-"):
            continue  # never read by the tokenizer; the id was taken above
        head.append(f"{_FIELD_NAMES.get(name.lower(), name)}: {value}")
    head += [
        "MIME-Version: 1.0",
        "Content-Type: text/plain; charset=utf-8",
        "Content-Transfer-Encoding: 8bit",
    ]
    while body and not body[0].strip():
        body = body[1:]
    text = "\r\n".join(head) + "\r\n\r\n" + "\r\n".join(body).rstrip() + "\r\n"
    return text.encode("utf-8", "surrogateescape")
