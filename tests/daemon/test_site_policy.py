"""Site policy matching (daemon/site_policy.py): patterns, networks, precedence, recipients."""

from __future__ import annotations

import pytest

from mailweir.daemon.errors import ConfigError
from mailweir.daemon.settings import PolicySettings, RecipientPolicy
from mailweir.daemon.site_policy import (
    AddressPatterns,
    ListHit,
    Networks,
    SitePolicy,
    client_address,
    compiled,
    split_address,
)

MAREN = "maren.okafor@harbourlane.example"


def test_split_address_strips_brackets_case_and_root_dot() -> None:
    assert split_address("<Orders@VetSupply.Example.>") == ("orders", "vetsupply.example")
    assert split_address("<>") == ("", "")
    assert split_address(None) == ("", "")
    # RFC 5321 section 4.5.1: "Postmaster" without a domain is a valid recipient.
    assert split_address("<Postmaster>") == ("postmaster", "")


def test_address_patterns_address_domain_and_tree() -> None:
    patterns = AddressPatterns("k", ["Orders@VetSupply.example", "@mail.example", "@.labs.example"])
    assert patterns.find("orders@vetsupply.example") == "Orders@VetSupply.example"
    assert patterns.find("accounts@vetsupply.example") is None
    assert patterns.find("someone@mail.example") == "@mail.example"
    assert patterns.find("someone@eu.mail.example") is None  # "@domain" is that domain only
    assert patterns.find("x@labs.example") == "@.labs.example"  # "@.domain": it and below
    assert patterns.find("x@a.b.labs.example") == "@.labs.example"
    assert patterns.find("x@otherlabs.example") is None  # a label boundary, not a suffix
    assert patterns.find("<>") is None


def test_address_patterns_most_specific_wins() -> None:
    patterns = AddressPatterns(
        "k", ["@.vetsupply.example", "@eu.vetsupply.example", "anna@eu.vetsupply.example"]
    )
    assert patterns.find("anna@eu.vetsupply.example") == "anna@eu.vetsupply.example"
    assert patterns.find("bob@eu.vetsupply.example") == "@eu.vetsupply.example"
    assert patterns.find("bob@us.vetsupply.example") == "@.vetsupply.example"


@pytest.mark.parametrize(
    "entry",
    ["vetsupply.example", "@", "a@", "x@.vetsupply.example", "@a..example", "a b@c.example", ""],
)
def test_address_patterns_bad_entry_names_key(entry: str) -> None:
    with pytest.raises(ConfigError) as caught:
        AddressPatterns("policy.allow_senders", [entry])
    assert caught.value.key == "policy.allow_senders"
    assert repr(entry) in caught.value.reason


def test_address_patterns_duplicate_refused() -> None:
    with pytest.raises(ConfigError, match="twice"):
        AddressPatterns("policy.block_senders", ["@mail.example", "@MAIL.example"])


def test_networks_ipv4_ipv6_and_mapped() -> None:
    # Addresses from the RFC 5737 and RFC 3849 documentation ranges.
    nets = Networks("k", ["192.0.2.0/24", "2001:db8:1::/48"])
    assert nets.find(client_address(("192.0.2.77", 25))) == "192.0.2.0/24"
    assert nets.find(client_address(("198.51.100.1", 25))) is None
    assert nets.find(client_address(("2001:db8:1:2::5", 25, 0, 0))) == "2001:db8:1::/48"
    assert nets.find(client_address(("2001:db8:2::5", 25, 0, 0))) is None
    assert nets.find(client_address(("::ffff:192.0.2.9", 25, 0, 0))) == "192.0.2.0/24"
    assert nets.find(client_address(("fe80::1%eth0", 25, 0, 2))) is None
    assert nets.find(client_address("/run/mailweir.sock")) is None
    assert nets.find(client_address(None)) is None


def test_networks_bad_entry_names_key() -> None:
    with pytest.raises(ConfigError) as caught:
        Networks("policy.block_networks", ["192.0.2.1/24"])  # host bits set
    assert caught.value.key == "policy.block_networks"


def test_sender_hit_block_wins_over_allow() -> None:
    site = SitePolicy(
        PolicySettings(
            allow_senders=("@vetsupply.example",),
            block_networks=("198.51.100.0/24",),
            block_senders=("intern@vetsupply.example",),
        )
    )
    inside, outside = ("192.0.2.10", 25), ("198.51.100.20", 25)
    allowed = ListHit("allow", "policy.allow_senders", "@vetsupply.example")
    assert site.sender_hit("orders@vetsupply.example", inside) == allowed
    # A sender on the allow list, forged from a blocked network: the network decides.
    assert site.sender_hit("orders@vetsupply.example", outside) == ListHit(
        "block", "policy.block_networks", "198.51.100.0/24"
    )
    assert site.sender_hit("intern@vetsupply.example", inside) == ListHit(
        "block", "policy.block_senders", "intern@vetsupply.example"
    )
    assert site.sender_hit("owner@mail.example", inside) is None


def test_sender_hit_allow_network_and_null_sender() -> None:
    site = SitePolicy(PolicySettings(allow_networks=("192.0.2.0/24",)))
    assert site.sender_hit("", ("192.0.2.1", 25)) == ListHit(
        "allow", "policy.allow_networks", "192.0.2.0/24"
    )
    assert site.sender_hit("", ("198.51.100.1", 25)) is None


def test_exempt_role_mailboxes_any_domain_any_case() -> None:
    site = SitePolicy(PolicySettings())
    assert site.is_exempt("Postmaster@harbourlane.example")
    assert site.is_exempt("abuse@lists.harbourlane.example")
    assert site.is_exempt("<postmaster>")
    assert not site.is_exempt(MAREN)
    assert not SitePolicy(PolicySettings(exempt_local_parts=())).is_exempt("abuse@x.example")


def test_exempt_local_part_with_domain_refused() -> None:
    with pytest.raises(ConfigError) as caught:
        SitePolicy(PolicySettings(exempt_local_parts=("abuse@harbourlane.example",)))
    assert caught.value.key == "policy.exempt_local_parts"


def test_recipient_view_rule_address_then_domain_and_fallback() -> None:
    policy = PolicySettings(
        recipient=(
            RecipientPolicy("@.lists.harbourlane.example", spam_threshold=0.995),
            RecipientPolicy(MAREN, suspect_threshold=0.3, spam_threshold=0.9, spam_action="pass"),
        )
    )
    site = SitePolicy(policy)
    maren = site.recipient_view(MAREN.upper())
    assert (maren.policy.suspect_threshold, maren.policy.spam_threshold) == (0.3, 0.9)
    assert maren.policy.spam_action == "pass" and maren.rule == MAREN
    listed = site.recipient_view("vets@eu.lists.harbourlane.example")
    assert listed.policy.spam_threshold == 0.995
    assert listed.policy.suspect_threshold == policy.suspect_threshold  # unset: [policy]'s
    other = site.recipient_view("priya.raman@harbourlane.example")
    assert other.policy is policy and other.rule == "" and not other.exempt
    assert site.recipient_view("abuse@lists.harbourlane.example").exempt


@pytest.mark.parametrize(
    ("rule", "key"),
    [
        (RecipientPolicy(MAREN, spam_threshold=1.5), "policy.recipient[0].spam_threshold"),
        (RecipientPolicy(MAREN, suspect_threshold=0.99), "policy.recipient[0].suspect_threshold"),
        (RecipientPolicy(MAREN, spam_action="reject"), "policy.recipient[0].spam_action"),
        (RecipientPolicy(MAREN, suspect_action="reroute"), "policy.recipient[0].suspect_action"),
        (RecipientPolicy("maren"), "policy.recipient[0].match"),
    ],
)
def test_recipient_rule_bad_values_name_the_rule(rule: RecipientPolicy, key: str) -> None:
    with pytest.raises(ConfigError) as caught:
        SitePolicy(PolicySettings(recipient=(rule,)))
    assert caught.value.key == key


def test_compiled_parses_once_per_settings_object() -> None:
    policy = PolicySettings(allow_senders=("@vetsupply.example",))
    assert compiled(policy) is compiled(policy)
    newer = PolicySettings(allow_senders=("@vetsupply.example",))
    assert compiled(newer) is not compiled(policy)


def test_networks_most_specific_entry_and_zero_prefix() -> None:
    nets = Networks("k", ["192.0.2.0/24", "192.0.2.128/25", "0.0.0.0/0"])
    assert nets.find(client_address("192.0.2.200")) == "192.0.2.128/25"
    assert nets.find(client_address("192.0.2.7")) == "192.0.2.0/24"
    assert nets.find(client_address("198.51.100.1")) == "0.0.0.0/0"
    assert nets.find(client_address("2001:db8::1")) is None  # an IPv4 list holds no IPv6
    assert Networks("k", ["2001:db8::1/128"]).find(client_address("2001:db8::1")) is not None
