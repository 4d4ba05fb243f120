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


SPAM_GREETINGS = [
    "Dear customer,",
    "Hello,",
    "Attention!",
    "Dear friend,",
    "Valued client,",
    "Good day,",
    "Dear account holder,",
    "",
]
SPAM_CLOSINGS = [
    "Regards, the team",
    "Act now.",
    "This offer expires tonight.",
    "Do not reply to this automated notice.",
    "Best wishes",
    "Customer care",
    "",
]
SPAM_LINES = {
    "parcel": [
        "We attempted delivery of your parcel but a customs fee is unpaid.",
        "Your package is held at our depot pending a small redelivery charge.",
        "Confirm your address within 24 hours or the parcel is returned to sender.",
        "Track and release your shipment using the secure link below.",
        "A courier will attempt delivery again once the fee is settled.",
    ],
    "invoice": [
        "The attached invoice is overdue and must be paid today.",
        "Remit payment immediately to avoid legal action and collection fees.",
        "Our beneficiary account details have changed; use the new account below.",
        "Open the attached statement for the outstanding balance.",
        "Failure to pay will result in suspension of your service.",
    ],
    "prize": [
        "Your e-mail address was selected in our international draw.",
        "You have won a cash prize and a luxury holiday package.",
        "To claim your winnings send your full name and bank details.",
        "A small processing fee releases the funds to your account.",
        "Keep this notice confidential until your claim is processed.",
    ],
    "investment": [
        "Our trading robot delivers guaranteed monthly returns.",
        "Risk free profit, withdraw any time, no experience needed.",
        "Early investors turned a small deposit into a fortune.",
        "Only a few places remain in the fund this month.",
        "Reply now to reserve your place and double your money.",
    ],
    "pharmacy": [
        "Best prices on pills with discreet worldwide shipping.",
        "No prescription needed, order today and save 80%.",
        "Top brands at a fraction of the pharmacy price.",
        "Free bonus pills with every order over fifty dollars.",
        "Satisfaction guaranteed or your money back.",
    ],
    "phishing": [
        "We detected an unusual sign-in to your mailbox.",
        "Your mailbox will be suspended unless you verify your password.",
        "Confirm your login details within 12 hours to keep access.",
        "Your storage quota is full; validate your account to receive new mail.",
        "Click the secure link below to restore full access.",
    ],
}
SPAM_SUBJECTS = {
    "parcel": [
        "Your parcel {ref} is on hold",
        "Delivery failed: action required",
        "Customs fee unpaid for shipment {ref}",
        "Package waiting at depot",
    ],
    "invoice": [
        "OVERDUE INVOICE #{ref} - final notice",
        "Payment overdue {amount}",
        "Outstanding balance - immediate action",
        "Invoice {ref} unpaid",
    ],
    "prize": [
        "Congratulations!!! You have WON",
        "You are our lucky winner",
        "Claim your {amount} prize now",
        "Winning notification {ref}",
    ],
    "investment": [
        "Guaranteed 40% monthly returns",
        "Double your money this month",
        "Limited places in our crypto fund",
        "Financial freedom starts today",
    ],
    "pharmacy": [
        "Cheap m3ds - no prescription needed",
        "80% off top brands",
        "Discreet pharmacy offer",
        "Your order discount inside",
    ],
    "phishing": [
        "Unusual sign-in activity on your mailbox",
        "Mailbox quota exceeded",
        "Verify your account now",
        "Password expiry notice",
    ],
}
SPAM_LINKS = {
    "parcel": "http://redelivery.example.net/track?id={ref}",
    "invoice": "http://invoice-centre.example.org/statement/{ref}",
    "prize": "http://claim-now.example.com/winner/{ref}",
    "investment": "http://fast-returns.example.net/join?ref={ref}",
    "pharmacy": "http://cheap-meds.example.org/shop?p={ref}",
    "phishing": "http://verify-login.example.com/confirm?u={ref}",
}
SPAM_DISGUISES = {  # what the visible link text claims to be
    "parcel": "parcel-service.example",
    "invoice": "secure-payments.example",
    "prize": "www.official-lottery.example",
    "investment": "www.trusted-bank.example",
    "pharmacy": "pharmacy.example",
    "phishing": "https://mail.harbourlane.example/login",
}


def _spam(
    rng: random.Random, when: datetime
) -> tuple[tuple[str, str], tuple[str, str], str, str, str | None]:
    kinds = list(SPAM_LINES)
    n = rng.randrange(len(kinds))
    kind = kinds[n]
    sender = JUNK_SENDERS[n]
    staff = _staff_address(rng)
    amount = rng.choice(["$4,850.00", "EUR 2,990", "$12,400", "GBP 780.50", "$1,000,000"])
    ref = rng.randrange(100000, 999999)
    lines = rng.sample(SPAM_LINES[kind], rng.randrange(2, 5))
    link = SPAM_LINKS[kind].format(ref=ref)
    text = "\n".join(
        [rng.choice(SPAM_GREETINGS), "", " ".join(lines), "", link, "", rng.choice(SPAM_CLOSINGS)]
    ).strip()
    subject = rng.choice(SPAM_SUBJECTS[kind]).format(ref=ref, amount=amount)
    html = None
    if rng.random() < 0.5:
        html = f'<p>{" ".join(lines)}</p><p><a href="{link}">{SPAM_DISGUISES[kind]}</a></p>'
    return sender, staff, subject, text, html


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
        "Dear Tobias,\n\nFINAL NOTICE: invoice 20417 for GBP 780.50 (linen service, "
        "October) is now overdue. Please remit payment TODAY to the usual account to avoid "
        "a late fee, or let us know if it has already been paid.\n\nCoastal Linen Service"
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
