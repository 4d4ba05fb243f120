"""Host names from URLs and addresses, and the registrable part of a host.

No public-suffix list is downloaded or bundled.  The registrable domain is the last two
labels, or the last three when the TLD has two letters and the second-level label is one of
the short generic ones used under country codes ("co.uk", "com.au", "ac.jp"); common
practice, no source.  It is wrong for some suffixes, consistently, which is all a token needs.
"""

from __future__ import annotations

import functools
import re
from typing import Final

_SHORT_SECOND_LEVEL: Final = frozenset(
    {"ac", "co", "com", "edu", "gob", "go", "gov", "gv", "ltd", "me", "mil", "ne", "net"}
    | {"nic", "nom", "or", "org", "plc", "sch"}
)
_HOST_CHARS: Final = re.compile(r"[^\w.\-]")
_IPV4: Final = re.compile(r"\d{1,3}(?:\.\d{1,3}){3}")
_URL_HOST: Final = re.compile(r"(?i)^\s*(?:[a-z][a-z0-9+.\-]{0,20}:)?//([^/?#\s\\]{1,300})")
_TEXT_URL: Final = re.compile(
    r"(?i)https?://([\w.\-:@\[\]]{1,300})|\b(www\.[\w.\-]{1,300})"
    r"|\b((?:[a-z0-9\-]{1,63}\.){1,8}(?:com|net|org|info|biz|ru|cn|example|test))\b"
)
# Any of the bare names' endings, in one search (12 against 18 thousand instructions for a
# message's non-word chunks, where a search per ending scanned them nine times).
_BARE_TLD: Final = re.compile(r"\.(?:com|net|org|info|biz|ru|cn|example|test)")
MAX_HOST: Final = 253


# Hosts repeat from message to message (a site's own domain, its correspondents, their relays):
# a bounded memo answers those from a dict.
MEMO_ENTRIES: Final = 4096


@functools.lru_cache(maxsize=MEMO_ENTRIES)
def clean_host(host: str) -> str:
    """Lower-case a host, drop user info, port, brackets and a trailing dot; "" if unusable."""
    host = host.rpartition("@")[2].strip().lower()
    if host.startswith("["):
        return host.strip("[]")[:MAX_HOST]
    host = host.partition(":")[0].strip(".")
    if not host or len(host) > MAX_HOST or _HOST_CHARS.search(host):
        return ""
    return host


def url_host(url: str) -> str:
    """Host of an absolute or scheme-relative URL; "" for relative links and mailto:."""
    match = _URL_HOST.match(url)
    return clean_host(match.group(1)) if match else ""


def text_hosts(text: str, limit: int = 200) -> list[str]:
    """Hosts named in case-folded text: "http(s)://host", "www.host" and bare "name.com"."""
    hosts: list[str] = []
    if "://" not in text and "www." not in text and _BARE_TLD.search(text) is None:
        return hosts
    for match in _TEXT_URL.finditer(text):
        host = clean_host(match.group(match.lastindex or 1))
        if host:
            hosts.append(host)
            if len(hosts) >= limit:
                break
    return hosts


def is_ip(host: str) -> bool:
    """True for an IPv4 dotted quad or a bracketed-style IPv6 literal (already unbracketed)."""
    return bool(_IPV4.fullmatch(host)) or ":" in host


@functools.lru_cache(maxsize=MEMO_ENTRIES)
def registrable(host: str) -> str:
    """The registrable domain of a cleaned host (see module docstring); IPs stay whole."""
    if is_ip(host):
        return host
    labels = [label for label in host.split(".") if label]
    if len(labels) <= 2:
        return ".".join(labels)
    keep = 3 if len(labels[-1]) == 2 and labels[-2] in _SHORT_SECOND_LEVEL else 2
    return ".".join(labels[-keep:])


def address_domain(address: str) -> str:
    """Cleaned domain of an e-mail address ("" when there is no '@')."""
    local, at, domain = address.strip().strip("<>").rpartition("@")
    if not at or not local:
        return ""
    return clean_host(domain.strip(">").strip())
