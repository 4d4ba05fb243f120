"""Site policy cost per message: the sender lists and the recipient rules, as the SMTP handler
asks them (daemon/site_policy.py), at list sizes a small organisation might reach.

    python bench/bench_site_policy.py [--messages 20000]

Prints figures only; nothing here asserts a speed (machines are noisy).
"""

from __future__ import annotations

import argparse
import time

from mailweir.daemon.settings import PolicySettings, RecipientPolicy
from mailweir.daemon.site_policy import SitePolicy

RECIPIENTS = ("maren.okafor@harbourlane.example", "abuse@harbourlane.example")


def policy(senders: int, networks: int, rules: int) -> PolicySettings:
    return PolicySettings(
        allow_senders=tuple(f"buyer{i}@supplier{i % 50}.example" for i in range(senders))
        + tuple(f"@.customer{i}.example" for i in range(senders // 5)),
        block_networks=tuple(f"198.51.{i % 256}.{(i // 256) * 4}/30" for i in range(networks)),
        recipient=tuple(
            RecipientPolicy(f"staff{i}@harbourlane.example", spam_threshold=0.9)
            for i in range(rules)
        ),
    )


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--messages", type=int, default=20_000)
    args = parser.parse_args()
    print("senders networks rules   build ms   per message µs (no match / allowed)")
    for senders, networks, rules in ((0, 0, 0), (100, 10, 5), (1000, 100, 50), (10000, 1000, 500)):
        settings = policy(senders, networks, rules)
        started = time.perf_counter()
        site = SitePolicy(settings)
        built = time.perf_counter() - started
        figures = []
        for sender in ("offers@x.y.mail.example", "buyer7@supplier7.example"):
            started = time.perf_counter()
            for _ in range(args.messages):
                site.sender_hit(sender, ("192.0.2.7", 25))
                for address in RECIPIENTS:
                    site.recipient_view(address)
            figures.append((time.perf_counter() - started) / args.messages * 1e6)
        print(
            f"{senders:7d} {networks:8d} {rules:5d} {built * 1e3:10.1f}"
            f"   {figures[0]:8.1f} / {figures[1]:.1f}"
        )


if __name__ == "__main__":
    main()
