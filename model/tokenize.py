"""Raw message bytes to a bounded set of tokens and their 64-bit hashes.

Token families (body words carry no prefix):

=========  ==============================================================================
subj:      subject words and shape (``subj:all-caps``, ``subj:reply``, ``subj:encoded``)
from:      sender display-name words (``from:name:``), domain (``from:dom:``)
rt:        reply-to domain (``rt:dom:``) and ``rt:same`` / ``rt:differs``
hdr:       mailer family, names of fields present, relay-hop bucket, Precedence
rcvd:      the newest relays' reverse-name domains (``rcvd:dom:``), ``rcvd:no-rdns``, HELO
auth:      the newest Authentication-Results: ``auth:spf:pass``, ``auth:dkim-pass:<domain>``
mid:       where the Message-ID was made (``mid:from-domain``, ``mid:dom:``, ``mid:none``)
list:      a mailing list's domain from List-Id (``list:dom:``)
ct:        content types, charsets (``ct:cs:``), transfer encodings (``ct:cte:``)
att:       attachment file types (``att:ext:pdf``, ``att:ext2:pdf.exe``)
mime:      structure (``mime:parts:3-4``, ``mime:html-only``) and trouble (``mime:limit-parts``)
url:       link and image hosts, ``url:ip``, ``url:text-host-differs``
dom:       registrable domains of those hosts
html:      ``html:hidden-style``
num:       numbers by digit count;  ``money:`` amounts by currency and magnitude
long:      words longer than 20 letters by length;  ``obf:`` markers of obfuscation
osb:       orthogonal sparse bigrams (only with ``TokenizerOptions.bigrams``)
=========  ==============================================================================

Header fields whose names start with ``OWN_HEADER_PREFIX`` are never read.
"""

from __future__ import annotations

import json
from dataclasses import asdict, dataclass
from hashlib import blake2b
from typing import Final

import numpy as np
import numpy.typing as npt

from .charsets import decode_bytes
from .domains import is_ip, registrable, text_hosts, url_host
from .hashing import hash_tokens, sorted_unique, token_hashes
from .header_tokens import (
    auth_tokens,
    bucket,
    relay_tokens,
    sender_tokens,
    structure_tokens,
    subject_tokens,
)
from .html_text import parse_html
from .mime import Limits, Part, Walk, walk
from .normalize import clean_text
from .pairs import first_pairs
from .token_texts import TokenTexts
from .types import OWN_HEADER_PREFIX, TokenHashes
from .words import osb_pairs, split_words

TOKENIZER_VERSION: Final = 3
"""Bumped whenever a change makes the same message and options give different tokens.

2: bigram hashes are mixed from their words' hashes (``pairs.py``), no longer BLAKE2b of the
pair string; single tokens hash as in 1, so only bigram models differ.
3: "rcvd:", "auth:", "mid:" and "list:" tokens from the Received, Authentication-Results,
Message-ID and List-Id fields, and "hdr:precedence:".  Every earlier token is made as before,
so a model made with 2 keeps its meaning; the new tokens start unknown to it (neutral) and are
learned from then on."""

_BODY_TYPES: Final = frozenset({"text/plain", "text/html"})
_MAX_EXT: Final = 8


@dataclass(frozen=True)
class TokenizerOptions:
    """Settings that decide which tokens a message yields.

    Attributes
    ----------
    bigrams : bool
        Add orthogonal sparse bigrams of the body words (Siefkes et al., 2004).
    bigram_window : int
        OSB window N in words; pairs skip k = 0 .. N-2 words.  Used only with ``bigrams``.
        2 (adjacent words only) replayed best on the development corpus, ahead of 3-6, with
        3.5 times fewer stored tokens than 5 (bench/ACCURACY.md, "Bigram window").
    ignore_headers : tuple of str
        Lower-case field-name prefixes whose fields are dropped before tokenizing.
    max_message_bytes : int
        Bytes of the raw message read; the rest is ignored.
    max_part_bytes : int
        Decoded bytes read per MIME part.
    max_parts : int
        MIME entities examined, containers included.
    max_depth : int
        Multipart / attached-message nesting followed.
    max_tokens : int
        Unique tokens kept per message (the first ones produced).
    """

    bigrams: bool = False
    bigram_window: int = 2
    ignore_headers: tuple[str, ...] = ()
    max_message_bytes: int = 2 * 1024 * 1024
    max_part_bytes: int = 256 * 1024
    max_parts: int = 64
    max_depth: int = 8
    max_tokens: int = 4000

    def __post_init__(self) -> None:
        prefixes = tuple(str(p).strip().lower() for p in self.ignore_headers)
        object.__setattr__(self, "ignore_headers", tuple(p for p in prefixes if p))
        if not 2 <= self.bigram_window <= 16:
            raise ValueError(f"bigram_window must be 2..16, got {self.bigram_window}")
        for name in ("max_message_bytes", "max_part_bytes", "max_parts", "max_depth"):
            if getattr(self, name) < 1:
                raise ValueError(f"{name} must be at least 1, got {getattr(self, name)}")
        if self.max_tokens < 1:
            raise ValueError(f"max_tokens must be at least 1, got {self.max_tokens}")

    def fingerprint(self) -> str:
        """Short stable string naming the tokenizer version and every setting here.

        Equal for options that produce the same tokens (the order and case of
        ``ignore_headers`` and the window when bigrams are off do not matter).
        """
        settings = asdict(self)
        settings["ignore_headers"] = sorted(set(self.ignore_headers))
        if not self.bigrams:
            settings["bigram_window"] = 0
        canonical = json.dumps(settings, sort_keys=True).encode("utf-8")
        return f"tok{TOKENIZER_VERSION}-{blake2b(canonical, digest_size=6).hexdigest()}"


DEFAULT_OPTIONS: Final = TokenizerOptions()


def tokens(raw: bytes, options: TokenizerOptions = DEFAULT_OPTIONS) -> list[str]:
    """Unique tokens of one raw message, in order of first appearance.

    Parameters
    ----------
    raw : bytes
        The message as received (RFC 5322, CRLF or LF line ends); anything else is tolerated.
    options : TokenizerOptions
        Limits and token choices.

    Returns
    -------
    list of str, length <= options.max_tokens
        Non-empty token strings.  Never raises: a failure inside yields "mime:failed" and
        whatever tokens were made before it.
    """
    found, sequences = _gather(raw, options)
    if options.bigrams:  # after all single tokens, so bigrams never crowd them out
        for sequence in sequences:
            if len(found) >= options.max_tokens:
                break
            pairs = osb_pairs(sequence, options.bigram_window)
            found.update(dict.fromkeys(pairs[: options.max_tokens * 2]))
    return list(found)[: options.max_tokens]


def tokenize(raw: bytes, options: TokenizerOptions = DEFAULT_OPTIONS) -> TokenHashes:
    """Token hashes of one raw message.

    Returns
    -------
    TokenHashes, shape (n,)
        ``hash_tokens(tokens(raw, options))``: unique int64 hashes sorted ascending.  With
        bigrams the pairs are hashed from their words' hashes (``pairs.py``) without making
        their strings; the result is the same.
    """
    if not options.bigrams:
        return hash_tokens(tokens(raw, options))
    found, sequences = _gather(raw, options)
    singles = list(found)[: options.max_tokens]
    room = options.max_tokens - len(singles)
    parts = [hash_tokens(singles)]
    if room > 0 and sequences:
        pairs, _, _ = _first_pairs(sequences, options, room)
        parts.append(pairs)
    return sorted_unique(np.concatenate(parts))


def tokens_and_hashes(
    raw: bytes, options: TokenizerOptions = DEFAULT_OPTIONS
) -> tuple[TokenTexts, TokenHashes]:
    """``tokens(raw, options)`` and the hash of each, aligned (for naming evidence).

    The same as ``token_hashes(tokens(raw, options))``, but bigram hashes come straight from
    the word hashes (``pairs.py``), and a bigram's text is made only when it is read
    (``token_texts.py``): a judge reads the few it names.

    Returns
    -------
    texts : TokenTexts, length n <= options.max_tokens
        A sequence equal to ``tokens(raw, options)``.
    hashes : TokenHashes, shape (n,)
        ``hashes[i]`` is ``token_hash(texts[i])``; not sorted, as ``tokens`` orders them.
    """
    found, sequences = _gather(raw, options)
    singles = list(found)[: options.max_tokens]
    hashes = token_hashes(singles)
    room = options.max_tokens - len(singles)
    if not (options.bigrams and room > 0 and sequences):
        return TokenTexts(singles), hashes
    pairs, part, at = _first_pairs(sequences, options, room)
    texts = TokenTexts(singles, sequences, options.bigram_window, part, at)
    return texts, np.concatenate([hashes, pairs])


def _first_pairs(
    sequences: list[list[str]], options: TokenizerOptions, room: int
) -> tuple[TokenHashes, npt.NDArray[np.intp], npt.NDArray[np.intp]]:
    """The pairs ``tokens`` keeps (the first ``room`` distinct ones, each part's first
    ``2 * max_tokens`` read), with each one's part and place (``pairs.first_pairs``)."""
    parts = [token_hashes(words) for words in sequences]
    return first_pairs(parts, options.bigram_window, room, options.max_tokens * 2)


def _gather(raw: bytes, options: TokenizerOptions) -> tuple[dict[str, None], list[list[str]]]:
    """Single tokens in order of first appearance, and each text part's words (for bigrams)."""
    found: dict[str, None] = {}
    sequences: list[list[str]] = []
    try:
        _collect(bytes(raw), options, found, sequences)
    except Exception:  # the contract is "never raises"; the marker token records the failure
        found["mime:failed"] = None
        sequences.clear()
    return found, sequences


def _collect(
    raw: bytes, options: TokenizerOptions, found: dict[str, None], sequences: list[list[str]]
) -> None:
    if len(raw) > options.max_message_bytes:
        raw = raw[: options.max_message_bytes]
        found["mime:limit-message"] = None
    limits = Limits(options.max_part_bytes, options.max_parts, options.max_depth)
    tree = walk(raw, limits, (OWN_HEADER_PREFIX, *options.ignore_headers))
    for family in (
        subject_tokens,
        sender_tokens,
        structure_tokens,
        relay_tokens,
        auth_tokens,
    ):
        found.update(dict.fromkeys(family(tree.top)))
    found.update(dict.fromkeys(_structure(tree)))
    for part in tree.leaves:
        if len(found) >= options.max_tokens:
            break
        sequences.append(_part_tokens(part, options, found)[: options.max_tokens])


def _structure(tree: Walk) -> list[str]:
    found = [f"ct:{kind}" for kind in tree.content_types]
    found.extend(f"mime:{note}" for note in sorted(tree.notes))
    found.append(f"mime:parts:{bucket(len(tree.leaves))}")
    kinds = {part.content_type for part in tree.leaves if not _is_attachment(part)}
    if "text/html" in kinds and "text/plain" not in kinds:
        found.append("mime:html-only")
    return found


def _is_attachment(part: Part) -> bool:
    return part.disposition[0] == "attachment" or bool(part.filename)


def _part_tokens(part: Part, options: TokenizerOptions, found: dict[str, None]) -> list[str]:
    """Add one leaf part's tokens to ``found``; return its body words in order (for bigrams)."""
    encoding = part.transfer_encoding
    if encoding and encoding not in ("7bit", "8bit"):
        found[f"ct:cte:{encoding[:20]}"] = None
    if _is_attachment(part):
        found.update(dict.fromkeys(_attachment_tokens(part.filename)))
    if part.content_type not in _BODY_TYPES:
        return []
    data, truncated, damaged = part.decoded_body(options.max_part_bytes)
    if truncated:
        found["mime:limit-part-bytes"] = None
    if damaged:
        found["mime:bad-base64"] = None
    charset = part.params.get("charset", "")
    if charset:
        found[f"ct:cs:{charset.lower()[:40]}"] = None
    text, mismatch = decode_bytes(data, charset)
    if mismatch:
        found["mime:charset-mismatch"] = None
    if part.content_type == "text/html":
        text = _html_tokens(text, found)
    cleaned, invisible = clean_text(text)
    if invisible:
        found["obf:invisible"] = None
    words = split_words(cleaned, sequence=options.bigrams)
    found.update(dict.fromkeys(_host_tokens(text_hosts(words.rest))))
    found.update(words.tokens)
    return words.sequence


def _html_tokens(markup: str, found: dict[str, None]) -> str:
    """Add link, image and hidden-text tokens of an HTML part; return its visible text."""
    content = parse_html(markup)
    if content.hidden_style:
        found["html:hidden-style"] = None
    for href, shown in content.links:
        host = url_host(href)
        scheme = href[:11].lower()
        if not host:
            if scheme.startswith("mailto:"):
                found["url:mailto"] = None
            elif scheme.startswith("javascript:"):
                found["url:script"] = None
            continue
        found.update(dict.fromkeys(_host_tokens([host])))
        named = text_hosts(clean_text(shown)[0], limit=4)
        if any(registrable(other) != registrable(host) for other in named):
            found["url:text-host-differs"] = None
    hosts = [url_host(source) for source in content.sources]
    found.update(dict.fromkeys(_host_tokens([host for host in hosts if host])))
    return content.text


def _host_tokens(hosts: list[str]) -> list[str]:
    found: list[str] = []
    for host in dict.fromkeys(hosts):
        if is_ip(host):
            found.append("url:ip")
        found.append(f"url:{host}")
        found.append(f"dom:{registrable(host)}")
    return found


def _attachment_tokens(filename: str) -> list[str]:
    """File type tokens: the last extension, and the last two when there are two."""
    parts = clean_text(filename.strip().strip("\"'"))[0].rsplit(".", 2)
    exts = [ext for ext in parts[1:] if 0 < len(ext) <= _MAX_EXT and ext.isalnum()]
    if len(parts) < 2 or not exts or exts[-1] != parts[-1]:
        return ["att:ext:none"]
    found = [f"att:ext:{exts[-1]}"]
    if len(exts) == 2:
        found.append(f"att:ext2:{exts[0]}.{exts[1]}")
    return found
