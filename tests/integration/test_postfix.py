"""A real Postfix in front of mailweir, configured with deploy/postfix/after-queue exactly.

The test builds a private Postfix instance in a temporary directory (its own configuration,
queue and data directories, every listener on 127.0.0.1, mail for harbourlane.example
delivered by Postfix's virtual agent into Maildirs under the same directory, everything else
refused), adds the after-queue snippets with only the port numbers changed, starts mailweir with
``mailweir run --config deploy/postfix/after-queue/mailweir.toml`` and submits mail to Postfix
with smtplib.  Oracle: Postfix's own delivery into the Maildir (what a user's mail client
would read), parsed with the standard ``email`` package.

Postfix's master daemon must start as root (it drops privileges per service), and is run in
the foreground (``postfix start-fg``, ``maillog_file = /dev/stdout``): on these machines the
backgrounding ``postfix start`` was seen to fail silently.
"""

from __future__ import annotations

import email
import email.policy
import os
import pwd
import re
import shutil
import signal
import smtplib
import socket
import subprocess
import sys
import tempfile
import time
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path

import pytest

pytestmark = pytest.mark.slow

ROOT = Path(__file__).resolve().parents[2]
POSTFIX_SNIPPETS = ROOT / "deploy" / "postfix"
POSTFIX = shutil.which("postfix") or "/usr/sbin/postfix"
SNIPPET_LISTEN_PORT, SNIPPET_NEXT_HOP_PORT = 7125, 7126  # as written in the snippets
QUARANTINE = "quarantine@harbourlane.example"
WAIT = 60.0  # seconds: upper bound for any one step (start, delivery); never a timing claim

# Test-only Postfix settings: a private instance that delivers harbourlane.example to Maildirs
# in the temporary directory and sends nothing anywhere else.
BASE_MAIN_CF = """\
compatibility_level = 3.6
queue_directory = {root}/queue
data_directory = {root}/data
command_directory = /usr/sbin
daemon_directory = /usr/lib/postfix/sbin
meta_directory = /etc/postfix
shlib_directory = /usr/lib/postfix
mail_owner = postfix
setgid_group = postdrop
maillog_file = /dev/stdout
myhostname = mx.harbourlane.example
mydomain = harbourlane.example
mydestination =
inet_interfaces = loopback-only
inet_protocols = ipv4
mynetworks = 127.0.0.1/32
smtputf8_enable = yes
alias_maps =
alias_database =
default_transport = error:the test instance delivers no mail elsewhere
relay_transport = error:the test instance delivers no mail elsewhere
virtual_mailbox_domains = harbourlane.example
virtual_mailbox_base = {root}/mail
virtual_mailbox_maps = texthash:{root}/conf/mailboxes
virtual_uid_maps = static:{uid}
virtual_gid_maps = static:{gid}
virtual_minimum_uid = 1
"""
# Test-only master.cf: the public smtpd on a free port, and the services Postfix needs, all
# outside a chroot (the instance directory holds none of the files a chroot would need).
FRONT_SMTPD = "127.0.0.1:{front} inet n - n - - smtpd\n"  # after the queue: a plain smtpd
BASE_MASTER_CF = """\
pickup    unix  n       -       n       60      1       pickup
cleanup   unix  n       -       n       -       0       cleanup
qmgr      unix  n       -       n       300     1       qmgr
rewrite   unix  -       -       n       -       -       trivial-rewrite
bounce    unix  -       -       n       -       0       bounce
defer     unix  -       -       n       -       0       bounce
trace     unix  -       -       n       -       0       bounce
verify    unix  -       -       n       -       1       verify
flush     unix  n       -       n       1000?   0       flush
proxymap  unix  -       -       n       -       -       proxymap
smtp      unix  -       -       n       -       -       smtp
showq     unix  n       -       n       -       -       showq
error     unix  -       -       n       -       -       error
retry     unix  -       -       n       -       -       error
discard   unix  -       -       n       -       -       discard
virtual   unix  -       n       n       -       -       virtual
anvil     unix  -       -       n       -       1       anvil
scache    unix  -       -       n       -       1       scache
postlog   unix-dgram n  -       n       -       1       postlogd
"""
# The feedback addresses are mailboxes too: Postfix must know them (the snippet says so), and
# anything mailweir wrongly relayed there would show up in them.
FEEDBACK_SPAM = "report-spam@harbourlane.example"  # as in the after-queue mailweir.toml
MAILBOXES = ("tobias", "priya", "quarantine", "report-spam", "report-wanted")
OUTSIDER = "127.0.0.2"  # a client address outside the test's mynetworks (127.0.0.1/32)


# -- messages we write ----------------------------------------------------------------------

HAM_LINES = [
    "Dr. Okafor asked me to confirm the rota for the Saturday surgery.",
    "The vaccine order from vetsupply arrives Tuesday; please check the fridge space.",
    "Mrs Hartley called about Biscuit's booster, can we offer Thursday afternoon?",
    "Reminder: the practice meeting is moved to the staff room at 8:15.",
    "Lab results for Pepper came back normal, please call the owner.",
    "Tobias, the invoice from the linen service is filed under March.",
]
SPAM_LINES = [
    "URGENT: your account is suspended, verify your password now at the link below.",
    "Congratulations WINNER, claim your cash prize today, reply with bank details.",
    "Guaranteed investment returns of 40% per month, act now, limited offer.",
    "Your parcel is held at customs, pay the release fee by card immediately.",
    "Final notice: overdue invoice attached, wire transfer required within 24 hours.",
    "Cheap pharmacy pills, no prescription needed, discreet worldwide shipping.",
]


def _message(sender: str, to: str, subject: str, body: str) -> bytes:
    return (
        f"From: {sender}\r\nTo: {to}\r\nSubject: {subject}\r\n"
        f"Message-ID: <{abs(hash((subject, body)))}@mail.example>\r\n"
        f"Date: Tue, 01 Dec 2026 09:00:00 +0000\r\n\r\n{body}\r\n"
    ).encode()


def _corpus(folder: Path, lines: list[str], sender: str, n: int) -> Path:
    folder.mkdir(parents=True)
    for i in range(n):
        picked = [lines[(i + k * (1 + i // len(lines))) % len(lines)] for k in range(3)]
        body = "\r\n".join([*picked, f"Reference HL-{i:04d}"])  # no two messages alike
        subject = lines[i % len(lines)][:40]
        (folder / f"{i:03d}.eml").write_bytes(
            _message(sender, "tobias@harbourlane.example", subject, body)
        )
    return folder


# -- processes ------------------------------------------------------------------------------


def _free_port() -> int:
    with socket.socket() as sock:
        sock.bind(("127.0.0.1", 0))
        return int(sock.getsockname()[1])


def _wait_for(what: str, ready: Callable[[], bool], diagnostics: Callable[[], str]) -> None:
    deadline = time.monotonic() + WAIT
    while time.monotonic() < deadline:
        if ready():
            return
        time.sleep(0.2)
    pytest.fail(f"{what} did not happen within {WAIT:.0f} s\n{diagnostics()}")


def _listening(port: int) -> bool:
    try:
        with socket.create_connection(("127.0.0.1", port), timeout=1):
            return True
    except OSError:
        return False


def _stop(process: subprocess.Popen[bytes], sig: int = signal.SIGTERM) -> None:
    if process.poll() is None:
        process.send_signal(sig)
        try:
            process.wait(timeout=30)
        except subprocess.TimeoutExpired:
            process.kill()
            process.wait(timeout=30)


@dataclass
class Instance:
    position: str  # "after-queue" or "before-queue"
    root: Path
    front: int  # Postfix's public smtpd
    filter: int  # mailweir
    back: int  # Postfix's reinjection listener
    postfix_log: Path
    mailweir_log: Path
    db: Path

    def logs(self) -> str:
        parts = []
        for name, path in (("postfix", self.postfix_log), ("mailweir", self.mailweir_log)):
            text = path.read_text(errors="replace") if path.exists() else "(none)"
            parts.append(f"--- {name} log (last 4000 characters) ---\n{text[-4000:]}")
        return "\n".join(parts)

    def delivered(self, mailbox: str) -> list[Path]:
        new = self.root / "mail" / mailbox / "new"
        return sorted(new.iterdir()) if new.is_dir() else []


def _skip_unless_postfix_can_run() -> None:
    if not Path(POSTFIX).exists():
        pytest.skip(f"Postfix is not installed ({POSTFIX} missing; apt-get install postfix)")
    if os.geteuid() != 0:
        pytest.skip(
            f"Postfix's master daemon must be started as root; the tests run as uid {os.geteuid()}"
        )
    try:
        pwd.getpwnam("postfix")
    except KeyError:
        pytest.skip("the postfix user does not exist (the postfix package is incomplete)")


def _write_postfix_config(root: Path, position: str, ports: dict[str, int]) -> None:
    def ours(name: str) -> str:  # the snippets exactly, with the test's free ports
        path = POSTFIX_SNIPPETS / position / name
        text = path.read_text() if path.exists() else ""
        for snippet_port, port in (
            (SNIPPET_LISTEN_PORT, ports["filter"]),
            (SNIPPET_NEXT_HOP_PORT, ports["back"]),
        ):
            text = re.sub(rf"(127\.0\.0\.1\]?):{snippet_port}\b", rf"\g<1>:{port}", text)
        assert not re.search(rf":({SNIPPET_LISTEN_PORT}|{SNIPPET_NEXT_HOP_PORT})\b", text)
        # Before the queue the snippet's public "smtp inet" service (port 25) listens on the
        # test's free port instead.
        text, public = re.subn(
            r"^smtp(\s+inet\s)", rf"127.0.0.1:{ports['front']}\1", text, flags=re.MULTILINE
        )
        assert public == (1 if position == "before-queue" and name == "master.cf" else 0)
        # Postfix tables named by the snippets are read from the instance's own directory.
        return text.replace("texthash:/etc/postfix/", f"texthash:{conf}/")

    nobody = pwd.getpwnam("nobody")
    conf = root / "conf"
    conf.mkdir()
    for table in ("mailweir_feedback",):
        if (POSTFIX_SNIPPETS / position / table).exists():
            shutil.copy(POSTFIX_SNIPPETS / position / table, conf / table)
    main_cf = BASE_MAIN_CF.format(root=root, uid=nobody.pw_uid, gid=nobody.pw_gid)
    (conf / "main.cf").write_text(main_cf + "\n" + ours("main.cf"))
    front = FRONT_SMTPD.format(front=ports["front"]) if position == "after-queue" else ""
    (conf / "master.cf").write_text(front + BASE_MASTER_CF + "\n" + ours("master.cf"))
    (conf / "mailboxes").write_text(
        "".join(f"{name}@harbourlane.example {name}/\n" for name in MAILBOXES)
    )
    for name in ("queue", "data", "mail"):
        (root / name).mkdir()
    shutil.chown(root / "data", "postfix")
    shutil.chown(root / "mail", nobody.pw_uid, nobody.pw_gid)


def _train(db: Path, scratch: Path) -> None:
    from mailweir.daemon.cli import main

    ham = _corpus(scratch / "ham", HAM_LINES, "staff@harbourlane.example", 24)
    spam = _corpus(scratch / "spam", SPAM_LINES, "offers@prize-centre.invalid", 24)
    assert main(["train", "--ham", str(ham), "--db", str(db), "--json"]) == 0
    assert main(["train", "--spam", str(spam), "--db", str(db), "--json"]) == 0


@contextmanager
def _running(position: str, capsys: pytest.CaptureFixture[str]) -> Iterator[Instance]:
    """Postfix with the snippets for ``position``, and mailweir behind or inside it."""
    _skip_unless_postfix_can_run()
    # Under /tmp, traversable by the postfix and nobody users (pytest's tmp_path is not).
    root = Path(tempfile.mkdtemp(prefix="mailweir-postfix-", dir="/tmp"))
    root.chmod(0o755)
    ports = {name: _free_port() for name in ("front", "filter", "back")}
    inst = Instance(
        position,
        root,
        ports["front"],
        ports["filter"],
        ports["back"],
        root / "postfix.log",
        root / "mailweir.log",
        root / "state" / "model.sqlite3",
    )
    _write_postfix_config(root, position, ports)
    conf = str(root / "conf")
    check = subprocess.run(
        [POSTFIX, "-c", conf, "check"], capture_output=True, text=True, timeout=WAIT
    )
    if check.returncode != 0:
        pytest.skip(f"postfix check fails for a private instance: {check.stderr.strip()}")
    (root / "state").mkdir()
    _train(inst.db, root / "corpus")
    capsys.readouterr()

    processes: list[subprocess.Popen[bytes]] = []
    try:
        with inst.postfix_log.open("wb") as out:
            postfix = subprocess.Popen(
                [POSTFIX, "-c", conf, "start-fg"],
                stdout=out,
                stderr=subprocess.STDOUT,
                start_new_session=True,
            )
        processes.append(postfix)
        _wait_for(
            "Postfix listening",
            lambda: _listening(inst.front) or postfix.poll() is not None,
            inst.logs,
        )
        if postfix.poll() is not None:
            pytest.skip(f"postfix start-fg exited with {postfix.returncode}:\n{inst.logs()}")
        processes.append(_start_mailweir(inst))
        _wait_for("mailweir listening", lambda: _listening(inst.filter), inst.logs)
        yield inst
    finally:
        for process in reversed(processes[1:]):
            _stop(process)
        if processes:
            subprocess.run([POSTFIX, "-c", conf, "stop"], capture_output=True, timeout=WAIT)
            _stop(processes[0])
        shutil.rmtree(root, ignore_errors=True)


@pytest.fixture
def after_queue(capsys: pytest.CaptureFixture[str]) -> Iterator[Instance]:
    with _running("after-queue", capsys) as inst:
        yield inst


@pytest.fixture
def before_queue(capsys: pytest.CaptureFixture[str]) -> Iterator[Instance]:
    with _running("before-queue", capsys) as inst:
        yield inst


def _start_mailweir(inst: Instance) -> subprocess.Popen[bytes]:
    env = {k: v for k, v in os.environ.items() if not k.startswith("MAILWEIR_")}
    env.update(
        {  # test-only policy on top of the snippet's mailweir.toml
            "MAILWEIR_POLICY_MODE": "enforce",
            "MAILWEIR_POLICY_HAM_ACTION": "tag",
            "MAILWEIR_POLICY_MIN_TRAINED": "10",
            "MAILWEIR_SMTP_HOSTNAME": "filter.harbourlane.example",
        }
    )
    if inst.position == "after-queue":  # before the queue the snippet's "reject" stays
        env["MAILWEIR_POLICY_SPAM_ACTION"] = "reroute"
        env["MAILWEIR_POLICY_QUARANTINE_MAILBOX"] = QUARANTINE
    command = [
        sys.executable,
        "-m",
        "mailweir.daemon.cli",
        "run",
        "--config",
        str(POSTFIX_SNIPPETS / inst.position / "mailweir.toml"),
        "--listen",
        f"127.0.0.1:{inst.filter}",
        "--next-hop",
        f"127.0.0.1:{inst.back}",
        "--db",
        str(inst.db),
        "--http",
        "127.0.0.1:0",
        "--state-dir",
        str(inst.root / "state"),
    ]
    with inst.mailweir_log.open("wb") as out:
        return subprocess.Popen(command, stdout=out, stderr=subprocess.STDOUT, env=env)


def _submit(
    inst: Instance,
    rcpt: str,
    raw: bytes,
    sender: str = "jo.hartley@mail.example",
    client_address: str = "127.0.0.1",
) -> None:
    with smtplib.SMTP(
        "127.0.0.1", inst.front, timeout=WAIT, source_address=(client_address, 0)
    ) as client:
        refused = client.sendmail(sender, [rcpt], raw)
    assert refused == {}


def _read(path: Path) -> email.message.EmailMessage:
    message = email.message_from_bytes(path.read_bytes(), policy=email.policy.default)
    assert isinstance(message, email.message.EmailMessage)
    return message


# -- the tests ------------------------------------------------------------------------------


def test_postfix_after_queue_delivers_ham_tagged_and_intact(after_queue: Instance) -> None:
    instance = after_queue
    long_line = "Weights for the dog-food order: " + "12.5kg, " * 200  # > 998 characters
    body = f"{HAM_LINES[1]}\r\n{HAM_LINES[4]}\r\n{long_line}"
    raw = _message("jo.hartley@mail.example", "tobias@harbourlane.example", "Fridge space", body)
    _submit(instance, "tobias@harbourlane.example", raw)
    _wait_for("delivery to tobias", lambda: bool(instance.delivered("tobias")), instance.logs)
    (path,) = instance.delivered("tobias")
    message = _read(path)
    assert message["Mailweir-Verdict"] is not None, instance.logs()
    assert message["Mailweir-Verdict"].startswith("ham"), message["Mailweir-Verdict"]
    assert message["Mailweir-Id"]
    assert message["Mailweir-Score"]
    # Postfix's Maildir copy has LF line ends; the body is otherwise byte for byte what we
    # sent, the long line unbroken (smtp_line_length_limit=0 in the snippet).
    delivered_body = path.read_bytes().split(b"\n\n", 1)[1]
    assert delivered_body == (body + "\r\n").replace("\r\n", "\n").encode()
    assert instance.delivered("quarantine") == []


def test_postfix_after_queue_reroutes_spam_to_quarantine(after_queue: Instance) -> None:
    instance = after_queue
    body = "\r\n".join(SPAM_LINES[:4])
    raw = _message("offers@prize-centre.invalid", "priya@harbourlane.example", "WINNER", body)
    _submit(instance, "priya@harbourlane.example", raw)
    _wait_for(
        "delivery to quarantine", lambda: bool(instance.delivered("quarantine")), instance.logs
    )
    (path,) = instance.delivered("quarantine")
    message = _read(path)
    assert message["Mailweir-Verdict"].startswith("spam"), message["Mailweir-Verdict"]
    assert "priya@harbourlane.example" in message["Mailweir-Original-Recipients"]
    assert message["Subject"] == "WINNER"
    assert instance.delivered("priya") == []


def test_postfix_before_queue_delivers_ham_tagged(before_queue: Instance) -> None:
    body = f"{HAM_LINES[0]}\r\n{HAM_LINES[3]}"
    raw = _message("jo.hartley@mail.example", "tobias@harbourlane.example", "Rota", body)
    _submit(before_queue, "tobias@harbourlane.example", raw)
    _wait_for(
        "delivery to tobias", lambda: bool(before_queue.delivered("tobias")), before_queue.logs
    )
    (path,) = before_queue.delivered("tobias")
    message = _read(path)
    assert message["Mailweir-Verdict"].startswith("ham"), before_queue.logs()
    assert path.read_bytes().split(b"\n\n", 1)[1] == (body + "\r\n").replace("\r\n", "\n").encode()


def test_postfix_before_queue_names_the_real_client_after_mailweir(before_queue: Instance) -> None:
    """Postfix's proxy tells mailweir the client by XFORWARD, and mailweir tells the
    after-filter listener (smtpd_authorized_xforward_hosts in the snippet), whose log then
    names the sending client beside mailweir's connection ("orig_client=", Postfix's own log
    format as this Postfix writes it).  The client connects from 127.0.0.2, mailweir from
    127.0.0.1."""
    body = f"{HAM_LINES[2]}\r\n{HAM_LINES[5]}"
    raw = _message("jo.hartley@mail.example", "tobias@harbourlane.example", "Cover", body)
    _submit(before_queue, "tobias@harbourlane.example", raw, client_address="127.0.0.2")
    _wait_for(
        "delivery to tobias", lambda: bool(before_queue.delivered("tobias")), before_queue.logs
    )
    returned = re.compile(
        r"mailweir-return/smtpd\[\d+\]: \w+: client=\S*\[127\.0\.0\.1\], "
        r"orig_client=\S*\[127\.0\.0\.2\]"
    )
    assert returned.search(before_queue.logs()), before_queue.logs()


def test_postfix_before_queue_refuses_spam_in_the_session(before_queue: Instance) -> None:
    # RFC 3463: 5.7.1 "delivery not authorized, message refused"; the code our reject uses.
    body = "\r\n".join(SPAM_LINES[1:5])
    raw = _message("offers@prize-centre.invalid", "priya@harbourlane.example", "Prize", body)
    with pytest.raises(smtplib.SMTPDataError) as refused:
        _submit(before_queue, "priya@harbourlane.example", raw)
    assert refused.value.smtp_code == 550, before_queue.logs()
    assert refused.value.smtp_error.startswith(b"5.7.1"), refused.value.smtp_error
    # Refused means not queued: nothing may reach any mailbox.
    assert before_queue.delivered("priya") == []
    assert before_queue.delivered("quarantine") == []


def _stored(inst: Instance, tracking_id: str) -> tuple[list[list[int]], list[int]] | None:
    """The counts of the tokens a verdict was judged on and the class totals, once the
    verdict is in the log (read from the daemon's own database, as ``mailweir stats`` does)."""
    from mailweir.store import ModelStore

    store = ModelStore.open(str(inst.db), create=False)
    try:
        verdict = store.find_verdict(tracking_id)
        if verdict is None or verdict.token_hashes is None:
            return None
        return store.lookup(verdict.token_hashes).tolist(), store.class_count().tolist()
    finally:
        store.close()


def _forward(message: email.message.EmailMessage, to: str) -> bytes:
    """Tobias's mail client forwarding ``message`` as an attachment."""
    forward = email.message.EmailMessage()
    forward["From"] = "Tobias Lindqvist <tobias@harbourlane.example>"
    forward["To"] = to
    forward["Subject"] = f"Fwd: {message['Subject']}"
    forward["Date"] = "Tue, 01 Dec 2026 10:00:00 +0000"
    forward["Message-ID"] = "<fwd-1@harbourlane.example>"
    forward.set_content("This one is junk, please learn from it.\n")
    forward.add_attachment(message)  # message/rfc822 (RFC 2046 section 5.2.1)
    return forward.as_bytes(policy=email.policy.SMTP)


def test_postfix_after_queue_forward_to_feedback_address_retrains(after_queue: Instance) -> None:
    instance = after_queue
    body = f"{HAM_LINES[2]}\r\n{HAM_LINES[5]}"
    raw = _message("jo.hartley@mail.example", "tobias@harbourlane.example", "Booster", body)
    _submit(instance, "tobias@harbourlane.example", raw)
    _wait_for("delivery to tobias", lambda: bool(instance.delivered("tobias")), instance.logs)
    (path,) = instance.delivered("tobias")
    delivered = _read(path)
    tracking_id = str(delivered["Mailweir-Id"])
    _wait_for(
        "the verdict logged", lambda: _stored(instance, tracking_id) is not None, instance.logs
    )
    before = _stored(instance, tracking_id)
    assert before is not None
    counts, totals = before

    _submit(
        instance,
        FEEDBACK_SPAM,
        _forward(delivered, FEEDBACK_SPAM),
        sender="tobias@harbourlane.example",
    )
    # Learned exactly once from the tokens the message was judged on (DESIGN.md "Feedback"):
    # each gains one spam message, the spam total one.
    expected = ([[ham, spam + 1] for ham, spam in counts], [totals[0], totals[1] + 1])
    _wait_for(
        "the correction stored", lambda: _stored(instance, tracking_id) == expected, instance.logs
    )
    assert "Correction stored" in instance.postfix_log.read_text(errors="replace")
    assert instance.delivered("report-spam") == []  # consumed by mailweir, never delivered


def test_postfix_after_queue_refuses_feedback_from_outside(after_queue: Instance) -> None:
    # Postfix's check from the snippet (mailweir_feedback): a client outside mynetworks that
    # is not logged in may not write to a feedback address.  RFC 5321 section 4.2.2: 554.
    raw = _message("offers@prize-centre.invalid", FEEDBACK_SPAM, "Learn this", HAM_LINES[0])
    with pytest.raises(smtplib.SMTPRecipientsRefused) as refused:
        _submit(after_queue, FEEDBACK_SPAM, raw, "offers@prize-centre.invalid", OUTSIDER)
    ((code, text),) = refused.value.recipients.values()
    assert code == 554 and b"5.7.1" in text, (code, text)
    # Other mail from the same client is still accepted and delivered.
    _submit(after_queue, "priya@harbourlane.example", raw, client_address=OUTSIDER)
    _wait_for("delivery to priya", lambda: bool(after_queue.delivered("priya")), after_queue.logs)
