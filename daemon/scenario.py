"""The demo's invented world: Harbour Lane Veterinary Practice and the mail it gets.

Everything here is made up: the practice, its people, suppliers and clients live on reserved
``example`` domains (RFC 2606), and the junk is written for this demo.  Messages are generated
from templates with a seeded random choice of details, so the demo and the tests that use it
are repeatable.
"""

from __future__ import annotations

import random
from dataclasses import dataclass
from datetime import UTC, datetime, timedelta
from email.utils import format_datetime

PRACTICE = "harbourlane.example"
QUARANTINE = f"quarantine@{PRACTICE}"
FEEDBACK_SPAM = f"report-spam@{PRACTICE}"
FEEDBACK_HAM = f"report-wanted@{PRACTICE}"

STAFF = [
    ("Dr. Maren Okafor", "maren.okafor"),
    ("Tobias Lindqvist", "tobias.lindqvist"),
    ("Priya Raman", "priya.raman"),
    ("Dr. Sean Whitlock", "sean.whitlock"),
    ("Ines Carvalho", "ines.carvalho"),
]
SUPPLIERS = [
    ("VetSupply Orders", "orders@vetsupply.example"),
    ("Northgate Diagnostics Lab", "results@northgate-lab.example"),
    ("Coastal Linen Service", "accounts@coastal-linen.example"),
    ("Brightwater Pharmacy Wholesale", "dispatch@brightwater-pharma.example"),
]
CLIENTS = [
    ("Alma Fitzgerald", "alma.fitz@mail.example"),
    ("Rashid Benali", "rbenali@post.example"),
    ("Greta Holm", "greta.holm@mail.example"),
    ("Council Dog Warden", "warden@town-council.example"),
    ("Hugo Marchetti", "hugo.m@inbox.example"),
]
PETS = ["Biscuit", "Mango", "Pepper", "Captain", "Luna", "Otis", "Juniper", "Waffles"]
TREATMENTS = [
    "vaccination booster",
    "dental check",
    "post-op review",
    "nail trim",
    "blood test",
    "weight check",
    "microchip scan",
    "flea treatment",
]
DAYS = ["Monday", "Tuesday", "Wednesday", "Thursday", "Friday", "Saturday"]
JUNK_SENDERS = [
    ("Parcel Desk", "notice@parcel-tracking.example.net"),
    ("Accounts Payable", "billing@invoice-centre.example.org"),
    ("Lottery Claims Office", "claims@prize-winners.example.com"),
    ("Crypto Growth Fund", "advisor@fast-returns.example.net"),
    ("Pharmacy Deals", "offers@cheap-meds.example.org"),
    ("Account Security", "security@verify-login.example.com"),
]


@dataclass(frozen=True)
class ScenarioMessage:
    label: str  # "ham" or "spam": what a person at the practice would call it
    sender: str
    recipients: tuple[str, ...]
    subject: str
    raw: bytes


def _staff_address(rng: random.Random) -> tuple[str, str]:
    name, local = rng.choice(STAFF)
    return name, f"{local}@{PRACTICE}"


def _message(
    rng: random.Random,
    sender: tuple[str, str],
    to: tuple[str, str],
    subject: str,
    body: str,
    *,
    html: str | None = None,
    when: datetime,
) -> bytes:
    from_domain = sender[1].rsplit("@", 1)[1]
    head = [
        f"From: {sender[0]} <{sender[1]}>",
        f"To: {to[0]} <{to[1]}>",
        f"Subject: {subject}",
        f"Date: {format_datetime(when)}",
        f"Message-ID: <{rng.getrandbits(64):016x}.{when:%Y%m%d%H%M}@{from_domain}>",
        "MIME-Version: 1.0",
    ]
    if html is None:
        head += ["Content-Type: text/plain; charset=utf-8", "Content-Transfer-Encoding: 8bit"]
        text = "\r\n".join(head) + "\r\n\r\n" + body.replace("\n", "\r\n") + "\r\n"
        return text.encode("utf-8")
    boundary = f"=_harbour_{rng.getrandbits(32):08x}"
    head.append(f'Content-Type: multipart/alternative; boundary="{boundary}"')
    parts = [
        f"--{boundary}\r\nContent-Type: text/plain; charset=utf-8\r\n\r\n{body}",
        f"--{boundary}\r\nContent-Type: text/html; charset=utf-8\r\n\r\n{html}",
        f"--{boundary}--",
    ]
    text = "\r\n".join(head) + "\r\n\r\n" + "\r\n".join(parts).replace("\n", "\r\n") + "\r\n"
    return text.encode("utf-8")


def _ham(rng: random.Random, when: datetime) -> tuple[tuple[str, str], tuple[str, str], str, str]:
    kind = rng.randrange(5)
    staff = _staff_address(rng)
    pet, treatment, day = rng.choice(PETS), rng.choice(TREATMENTS), rng.choice(DAYS)
    if kind == 0:
        client = rng.choice(CLIENTS)
        return (
            client,
            staff,
            f"Appointment for {pet} on {day}",
            (
                f"Hello,\n\nCould we move {pet}'s {treatment} to {day} afternoon? "
                f"The morning slot clashes with school pick-up.\n\nThanks,\n{client[0]}"
            ),
        )
    if kind == 1:
        supplier = rng.choice(SUPPLIERS)
        ref = rng.randrange(10000, 99999)
        return (
            supplier,
            staff,
            f"Order {ref} dispatched",
            (
                f"Dear Harbour Lane team,\n\nYour order {ref} left our warehouse today and will "
                f"arrive {day}. Items: surgical gloves, {treatment} supplies, sterile drapes.\n"
                f"The invoice follows on your usual 30-day account terms.\n\n{supplier[0]}"
            ),
        )
    if kind == 2:
        lab = SUPPLIERS[1]
        return (
            lab,
            staff,
            f"Lab results ready: {pet}",
            (
                f"Results for patient {pet} ({treatment}) are available in the practice portal. "
                f"Haematology within reference ranges; please call us about the thyroid panel.\n\n"
                f"Northgate Diagnostics"
            ),
        )
    if kind == 3:
        colleague = _staff_address(rng)
        return (
            colleague,
            staff,
            f"Rota for {day}",
            (
                f"Hi,\n\nCan you cover reception on {day} while I'm at the CPD course? "
                f"{pet} is booked in for a {treatment} at 10:30; the notes are on the clinic "
                f"system.\n\nCheers"
            ),
        )
    client = rng.choice(CLIENTS)
    return (
        client,
        staff,
        f"Thank you from {pet}'s family",
        (
            f"Dear all,\n\nJust a note to thank the team for looking after {pet} so well after "
            f"the {treatment}. We'll settle the bill at the front desk on {day}.\n\n{client[0]}"
        ),
    )


def _spam(
    rng: random.Random, when: datetime
) -> tuple[tuple[str, str], tuple[str, str], str, str, str | None]:
    kind = rng.randrange(6)
    sender = JUNK_SENDERS[kind]
    staff = _staff_address(rng)
    amount = rng.choice(["$4,850.00", "EUR 2,990", "$12,400", "GBP 780.50"])
    ref = rng.randrange(100000, 999999)
    if kind == 0:
        link = f"http://redelivery.example.net/track?id={ref}"
        return (
            sender,
            staff,
            f"Your parcel {ref} is on hold - action required",
            (
                f"We attempted delivery of parcel {ref} but a customs fee of 1.99 is unpaid.\n"
                f"Pay within 24 hours or the parcel is returned: {link}"
            ),
            f'<p>Customs fee unpaid. <a href="{link}">parcel-service.example</a></p>',
        )
    if kind == 1:
        return (
            sender,
            staff,
            f"OVERDUE INVOICE #{ref} - final notice",
            (
                f"Attention accounts department,\n\nInvoice #{ref} for {amount} is overdue. "
                f"Open the attached statement and remit payment TODAY to avoid legal action.\n"
                f"Wire details change: use the new beneficiary account below."
            ),
            None,
        )
    if kind == 2:
        link = f"http://claim-now.example.com/winner/{ref}"
        return (
            sender,
            staff,
            "Congratulations!!! You have WON",
            (
                f"Dear lucky winner, your e-mail was selected in our international draw and you "
                f"have won {amount}. To claim your prize send your full name, bank details and a "
                f"processing fee. Claim here: {link}"
            ),
            f'<p><b>WINNER</b> claim <a href="{link}">www.official-lottery.example</a></p>',
        )
    if kind == 3:
        return (
            sender,
            staff,
            "Guaranteed 40% monthly returns - limited places",
            (
                f"Our crypto trading robot turned {amount} into a fortune for investors like you. "
                f"Risk free, guaranteed profit, withdraw any time. Reply now to reserve one of the "
                f"last places in the fund."
            ),
            None,
        )
    if kind == 4:
        link = "http://cheap-meds.example.org/shop"
        return (
            sender,
            staff,
            "Cheap m3ds - no prescription needed",
            (
                f"Best prices on pills, 80% off, discreet shipping worldwide, no prescription. "
                f"Order today: {link}"
            ),
            f'<p>V 1 A G R A 80% off <a href="{link}">shop</a></p>',
        )
    link = f"http://verify-login.example.com/confirm?u={ref}"
    return (
        sender,
        staff,
        "Unusual sign-in activity on your mailbox",
        (
            f"We detected an unusual sign-in. Your mailbox will be suspended unless you verify "
            f"your password within 12 hours: {link}"
        ),
        f'<p>Verify now: <a href="{link}">https://mail.harbourlane.example/login</a></p>',
    )


def generate(count: int, label: str, seed: int) -> list[ScenarioMessage]:
    """``count`` invented messages of one label, the same for the same seed."""
    rng = random.Random(f"{label}:{seed}")
    start = datetime(2026, 11, 2, 8, 0, tzinfo=UTC)
    out = []
    for i in range(count):
        when = start + timedelta(minutes=37 * i + rng.randrange(30))
        if label == "ham":
            sender, to, subject, body = _ham(rng, when)
            raw = _message(rng, sender, to, subject, body, when=when)
        else:
            sender, to, subject, body, html = _spam(rng, when)
            raw = _message(rng, sender, to, subject, body, html=html, when=when)
        out.append(ScenarioMessage(label, sender[1], (to[1],), subject, raw))
    return out


def training_set(per_class: int = 150) -> list[ScenarioMessage]:
    """Mail the practice already sorted: the demo trains its model on this."""
    return generate(per_class, "ham", 1) + generate(per_class, "spam", 1)


def overdue_reminder() -> ScenarioMessage:
    """Wanted mail that reads like junk: the supplier's real payment reminder.

    The demo uses it to show a correction through the feedback address moving the score.
    """
    rng = random.Random("reminder")
    sender = SUPPLIERS[2]
    to = ("Tobias Lindqvist", f"tobias.lindqvist@{PRACTICE}")
    body = (
        "Dear Tobias,\n\nOur records show invoice 20417 for GBP 780.50 (linen service, "
        "October) is now overdue. Please remit payment to the usual account at your earliest "
        "convenience, or let us know if it has already been paid.\n\nCoastal Linen Service"
    )
    when = datetime(2026, 11, 30, 9, 15, tzinfo=UTC)
    subject = "Payment reminder: invoice 20417 overdue"
    raw = _message(rng, sender, to, subject, body, when=when)
    return ScenarioMessage("ham", sender[1], (to[1],), subject, raw)


def incoming(per_class: int = 5) -> list[ScenarioMessage]:
    """A fresh morning's mail that the demo pushes through the running filter."""
    ham, spam = generate(per_class, "ham", 2), generate(per_class, "spam", 2)
    mixed = [m for pair in zip(ham, spam, strict=True) for m in pair]
    return [*mixed, overdue_reminder()]
