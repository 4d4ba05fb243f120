"""Tokenizer features on messages written for the Harbour Lane Veterinary Practice scenario.

Expected tokens follow the contract in mailweir.model.tokenize's docstring; MIME and charset
behaviour follows RFC 2045-2047 (sections named beside the checks).
"""

from __future__ import annotations

import base64
import quopri
import subprocess
import sys

import numpy as np
import pytest

from mailweir.model.hashing import hash_tokens
from mailweir.model.tokenize import DEFAULT_OPTIONS, TokenizerOptions, tokenize, tokens

HEAD = (
    'From: "Dr. Maren Okafor" <maren.okafor@harbourlane.example>\r\n'
    "To: Tobias Lindqvist <tobias@harbourlane.example>\r\n"
    "Date: Tue, 1 Dec 2026 09:00:00 +0000\r\n"
    "Message-ID: <t1@harbourlane.example>\r\n"
    "MIME-Version: 1.0\r\n"
)


def plain(
    body: str, subject: str = "Vaccine order", extra: str = "", charset: str = "utf-8"
) -> bytes:
    head = HEAD + extra + f"Subject: {subject}\r\nContent-Type: text/plain; charset={charset}\r\n"
    return (head + "\r\n").encode() + body.encode(charset if charset != "x" else "utf-8")


def html_message(markup: str) -> bytes:
    return (
        HEAD + "Subject: Offer\r\nContent-Type: text/html; charset=utf-8\r\n\r\n" + markup
    ).encode()


def test_tokens_plain_words_and_subject() -> None:
    found = tokens(plain("Please order forty doses of kennel cough vaccine."))
    assert {"please", "order", "forty", "doses", "kennel", "cough", "vaccine"} <= set(found)
    assert {"subj:vaccine", "subj:order"} <= set(found)
    assert "of" not in found  # words shorter than three letters are dropped


def test_tokens_multipart_alternative_qp_and_base64() -> None:
    # RFC 2045 section 6.7 (quoted-printable) and 6.8 (base64) bodies in one
    # multipart/alternative (RFC 2046 section 5.1.4).
    text = "Bitte bestätigen Sie den Termin für Bello am Freitag."
    qp = quopri.encodestring(text.encode("utf-8")).decode("ascii")
    html = base64.encodebytes(b"<p>Confirm <b>Bello</b>'s appointment: surgery Friday</p>")
    raw = (
        HEAD + "Subject: Termin\r\nContent-Type: multipart/alternative; boundary=alt\r\n\r\n"
        "--alt\r\nContent-Type: text/plain; charset=utf-8\r\n"
        "Content-Transfer-Encoding: quoted-printable\r\n\r\n" + qp + "\r\n"
        "--alt\r\nContent-Type: text/html; charset=utf-8\r\n"
        "Content-Transfer-Encoding: base64\r\n\r\n" + html.decode("ascii") + "--alt--\r\n"
    ).encode()
    found = set(tokens(raw))
    assert {"bestätigen", "termin", "für", "freitag"} <= found
    assert {"confirm", "bello's", "appointment", "surgery", "friday"} <= found
    assert {"ct:multipart/alternative", "ct:text/plain", "ct:text/html"} <= found
    assert {"ct:cte:quoted-printable", "ct:cte:base64", "mime:parts:2"} <= found
    assert "mime:html-only" not in found


def test_tokens_html_only_and_visible_text() -> None:
    markup = (
        "<html><head><style>.x{color:red}</style><script>var hidden='scriptword';</script>"
        "</head><body><!-- commentword --><p>Dear client, fr<b></b>ee &amp; easy</p>"
        "</body></html>"
    )
    found = set(tokens(html_message(markup)))
    assert {"dear", "client", "free", "easy", "mime:html-only"} <= found
    assert not {"scriptword", "commentword", "color", "hidden"} & found


def test_tokens_html_hidden_style() -> None:
    hidden = '<p>Hello</p><div style="font-size:0px">salad words</div>'
    shown = '<p style="font-size:1.5em">Hello</p><p style="font-size: 10px">small print</p>'
    assert "html:hidden-style" in tokens(html_message(hidden))
    assert "html:hidden-style" not in tokens(html_message(shown))


def test_tokens_html_link_host_mismatch() -> None:
    markup = (
        '<p>Your account: <a href="https://login.payments-check.example/x">'
        "https://www.harbourlane.example/account</a></p>"
    )
    found = set(tokens(html_message(markup)))
    assert "url:login.payments-check.example" in found
    assert "dom:payments-check.example" in found
    assert "url:text-host-differs" in found


def test_tokens_html_link_same_domain_is_not_a_mismatch() -> None:
    markup = '<a href="https://book.harbourlane.example/">www.harbourlane.example</a>'
    found = set(tokens(html_message(markup)))
    assert "dom:harbourlane.example" in found
    assert "url:text-host-differs" not in found


def test_tokens_registrable_domain_under_country_code() -> None:
    # Rule of model/domains.py: three labels when a short second level sits under a 2-letter TLD.
    found = set(
        tokens(
            html_message('<a href="http://a.b.shop.co.uk/">x</a><img src="//198.51.100.7/p.gif">')
        )
    )
    assert {"url:a.b.shop.co.uk", "dom:shop.co.uk", "url:ip", "dom:198.51.100.7"} <= found


def test_tokens_plain_text_urls() -> None:
    found = set(tokens(plain("Order at https://shop.vetsupply.example/gloves today")))
    assert {"url:shop.vetsupply.example", "dom:vetsupply.example"} <= found


def test_tokens_wrong_declared_charset_latin1_as_utf8() -> None:
    body = "Die Hündin braucht eine Impfung. Grüße aus der Praxis".encode("latin-1")
    raw = plain("", charset="utf-8") + body
    found = set(tokens(raw))
    assert {"hündin", "grüsse", "mime:charset-mismatch"} <= found  # casefold("ß") == "ss"


def test_tokens_wrong_declared_charset_utf8_as_latin1() -> None:
    body = "Die Hündin braucht eine Impfung. Grüße aus der Praxis".encode()
    raw = plain("", charset="iso-8859-1") + body
    found = set(tokens(raw))
    assert {"hündin", "grüsse", "mime:charset-mismatch"} <= found  # casefold("ß") == "ss"
    assert "hã¼ndin" not in found


def test_tokens_encoded_subject_rfc2047() -> None:
    found = set(
        tokens(plain("x", subject="=?utf-8?q?Gr=C3=BC=C3=9Fe_aus_Harbour?= =?utf-8?b?TGFuZQ==?="))
    )
    # NFKC + case folding turn "ß" into "ss" (Unicode case folding, CaseFolding.txt).
    assert {"subj:encoded", "subj:grüsse", "subj:aus", "subj:harbourlane"} <= found


def test_tokens_obfuscated_letters_and_digits() -> None:
    found = set(tokens(plain("Buy V-I-A-G-R-A and v1agra now, fr33 shipping, h@ppy pets!")))
    assert {"viagra", "v-i-a-g-r-a", "v1agra", "free", "fr33", "happy", "h@ppy"} <= found
    assert {"obf:leet", "obf:spaced"} <= found


def test_tokens_spaced_letters() -> None:
    found = set(tokens(plain("Get your f r e e sample of c h e a p pills")))
    assert {"free", "f r e e", "cheap", "c h e a p", "obf:spaced"} <= found


def test_tokens_ordinary_digit_words_are_not_obfuscation() -> None:
    found = set(tokens(plain("Surgery at 10am, weight 5kg, file scan.mp3")))
    assert "obf:leet" not in found
    assert "10am" in found


def test_tokens_invisible_characters_removed() -> None:
    # U+200B zero width space, U+00AD soft hyphen, U+202E right-to-left override.
    found = set(tokens(plain("Your ph\u200barm\u00adacy order, dis\u202ecount")))
    assert {"pharmacy", "discount", "obf:invisible"} <= found


def test_tokens_nfkc_fullwidth_and_case_folding() -> None:
    found = set(tokens(plain("ＦＲＥＥ Vaccine CLINIC")))  # fullwidth letters (NFKC -> ASCII)
    assert {"free", "vaccine", "clinic"} <= found


def test_tokens_numbers_and_money_buckets() -> None:
    found = set(
        tokens(plain("Invoice 4417: total $250.00, deposit €1.200,00 or 99 GBP; call 2026"))
    )
    assert {"num:len4", "num:len5", "num:len2"} <= found  # "250.00" has five digits
    assert {"money:$:100-999", "money:€:1000-9999", "money:£:10-99"} <= found
    assert "4417" not in found


def test_tokens_long_words_bucketed() -> None:
    found = set(tokens(plain("pneumonoultramicroscopicsilicovolcanoconiosis is long")))
    assert "long:40-49" in found
    assert "pneumonoultramicroscopicsilicovolcanoconiosis" not in found


def test_tokens_sender_and_reply_to() -> None:
    found = set(tokens(plain("hi", extra="Reply-To: claims@refunds-desk.example\r\n")))
    assert {"from:dom:harbourlane.example", "from:name:maren", "from:name:okafor"} <= found
    assert {"rt:dom:refunds-desk.example", "rt:differs"} <= found
    same = set(tokens(plain("hi", extra="Reply-To: office@harbourlane.example\r\n")))
    assert "rt:same" in same


def test_tokens_sender_memo_leaves_each_message_its_own_message_id() -> None:
    # The From and Reply-To tokens are memoised by those two fields; the Message-ID token,
    # second in order, is each message's own.
    def sent(message_id: str) -> list[str]:
        head = HEAD.replace("Message-ID: <t1@harbourlane.example>\r\n", message_id)
        return tokens(f"{head}Subject: Rota\r\n\r\nThe weekend rota is up.\r\n".encode())

    a = sent("Message-ID: <a1@harbourlane.example>\r\n")
    b = sent("Message-ID: <b2@bulk-mailer.example>\r\n")
    c = sent("")
    assert a[a.index("from:dom:harbourlane.example") + 1] == "mid:from-domain"
    assert b[b.index("from:dom:harbourlane.example") + 1] == "mid:dom:bulk-mailer.example"
    assert c[c.index("from:dom:harbourlane.example") + 1] == "mid:none"
    assert [t for t in a if not t.startswith("mid:")] == [t for t in b if not t.startswith("mid:")]


def test_tokens_mailer_and_field_names() -> None:
    found = set(tokens(plain("hi", extra="X-Mailer: Microsoft Outlook 16.0\r\n")))
    assert {"hdr:mailer:microsoft", "hdr:field:x-mailer", "hdr:field:subject"} <= found
    assert "hdr:mailer:none" in set(tokens(plain("hi")))


def test_tokens_attachments_by_extension() -> None:
    pdf = base64.b64encode(b"%PDF-1.4 fake").decode()
    raw = (
        HEAD + "Subject: Lab results\r\nContent-Type: multipart/mixed; boundary=mx\r\n\r\n"
        "--mx\r\nContent-Type: text/plain\r\n\r\nResults attached.\r\n"
        "--mx\r\nContent-Type: application/pdf; name=results.pdf\r\n"
        'Content-Disposition: attachment; filename="Bloodwork Bello.pdf"\r\n'
        "Content-Transfer-Encoding: base64\r\n\r\n" + pdf + "\r\n"
        "--mx\r\nContent-Type: application/octet-stream\r\n"
        "Content-Disposition: attachment; filename*=utf-8''invoice.pdf.exe\r\n\r\nMZ\r\n--mx--\r\n"
    ).encode()
    found = set(tokens(raw))
    assert {"att:ext:pdf", "att:ext:exe", "att:ext2:pdf.exe", "ct:application/pdf"} <= found
    assert "mime:parts:3-4" in found
    assert "results" in found


def test_tokens_own_header_fields_never_read() -> None:
    base = plain("Kennel booking confirmed")
    ours = plain("Kennel booking confirmed", extra="Mailweir-Verdict: spam; score=0.99\r\n")
    assert tokens(base) == tokens(ours)
    assert not any("mailweir" in token or "0.99" in token for token in tokens(ours))


def test_tokens_ignore_headers_option() -> None:
    raw = plain("hi", extra="X-Corpus-Label: spam\r\nX-Corpus-Id: 17\r\n")
    assert "hdr:field:x-corpus-label" in tokens(raw)
    options = TokenizerOptions(ignore_headers=("X-Corpus-",))
    found = tokens(raw, options)
    assert not any("corpus" in token for token in found)
    assert tokens(raw, options) == tokens(plain("hi"), options)


def test_tokens_osb_bigrams_documented_pairs() -> None:
    # Siefkes et al. (2004): with window N, each word pairs with the N-1 words before it,
    # the pair recording the number of skipped words; N=3 gives skips 0 and 1.
    options = TokenizerOptions(bigrams=True, bigram_window=3)
    found = tokens(plain("buy cheap pills now", subject="x"), options)
    pairs = [token for token in found if token.startswith("osb:")]
    assert pairs == [
        "osb:0:buy cheap",
        "osb:0:cheap pills",
        "osb:1:buy pills",
        "osb:0:pills now",
        "osb:1:cheap now",
    ]
    assert not any(t.startswith("osb:") for t in tokens(plain("buy cheap pills now")))


def test_tokens_nul_bytes() -> None:
    found = tokens(plain("kennel\x00cough\x00\x00vaccine"))
    assert {"kennel", "cough", "vaccine"} <= set(found)


def test_tokens_two_megabyte_single_line_is_bounded() -> None:
    raw = plain("") + b"appointment " + b"x" * (2 * 1024 * 1024)
    found = tokens(raw)
    assert "appointment" in found
    assert "long:60+" in found
    assert "mime:limit-message" in found or "mime:limit-part-bytes" in found


def test_tokens_many_parts_obey_limit() -> None:
    parts = "".join(f"--b\r\nContent-Type: text/plain\r\n\r\nword{i:03d}x\r\n" for i in range(200))
    raw = (
        HEAD + "Subject: x\r\nContent-Type: multipart/mixed; boundary=b\r\n\r\n" + parts
    ).encode()
    options = TokenizerOptions(max_parts=10)
    found = tokens(raw, options)
    # Nine children fit under the top-level entity (10 entities in all, RFC-neutral limit).
    assert {f"word{i:03d}x" for i in range(9)} <= set(found)
    assert "word009x" not in found
    assert "mime:limit-parts" in found


def test_tokens_deep_nesting_obeys_limit() -> None:
    raw = HEAD.encode() + b"Subject: nest\r\n"
    for depth in range(50):
        raw += b'Content-Type: multipart/mixed; boundary="d%d"\r\n\r\n--d%d\r\n' % (depth, depth)
    raw += b"Content-Type: text/plain\r\n\r\ninnermostword\r\n"
    found = tokens(raw, TokenizerOptions(max_depth=8))
    assert "mime:limit-depth" in found
    assert "innermostword" not in found
    assert "innermostword" in tokens(raw, TokenizerOptions(max_depth=60, max_parts=100))


def test_tokens_max_tokens_keeps_first() -> None:
    words = " ".join(f"w{i:05d}x" for i in range(5000))
    found = tokens(plain(words), TokenizerOptions(max_tokens=100))
    assert len(found) == 100
    assert found[0] == "subj:vaccine"


def test_tokens_part_byte_limit() -> None:
    raw = plain("alpha " * 100 + "omegaword")
    assert "omegaword" not in tokens(raw, TokenizerOptions(max_part_bytes=100))
    assert "mime:limit-part-bytes" in tokens(raw, TokenizerOptions(max_part_bytes=100))


def test_tokens_not_bytes_does_not_raise() -> None:
    assert tokens("not bytes") == ["mime:failed"]  # type: ignore[arg-type]
    assert tokens(None) == ["mime:failed"]  # type: ignore[arg-type]


def test_tokens_same_order_in_processes_with_different_hash_seeds() -> None:
    # Set iteration order follows PYTHONHASHSEED; the token order (which decides what
    # max_tokens keeps) must not.
    code = (
        "import sys; from mailweir.model.tokenize import tokens; "
        "print(repr(tokens(sys.stdin.buffer.read())))"
    )
    raw = plain("Order 40 doses at $1,250, v1agra 10am f r e e https://shop.vetsupply.example/x.")
    outputs = {
        subprocess.run(
            [sys.executable, "-c", code],
            input=raw,
            capture_output=True,
            check=True,
            env={"PYTHONHASHSEED": seed},
        ).stdout
        for seed in ("0", "1", "2")
    }
    assert len(outputs) == 1


def test_tokenize_equals_hash_of_tokens() -> None:
    raw = plain("Reminder: Bello's booster is due on Friday")
    assert np.array_equal(tokenize(raw), hash_tokens(tokens(raw)))


def test_options_fingerprint_stable_and_sensitive() -> None:
    assert DEFAULT_OPTIONS.fingerprint() == TokenizerOptions().fingerprint()
    assert TokenizerOptions(bigram_window=3).fingerprint() == DEFAULT_OPTIONS.fingerprint()
    assert TokenizerOptions(bigrams=True).fingerprint() != DEFAULT_OPTIONS.fingerprint()
    a = TokenizerOptions(ignore_headers=("x-a-", "X-B-"))
    assert a.fingerprint() == TokenizerOptions(ignore_headers=("x-b-", "x-a-")).fingerprint()
    assert TokenizerOptions(max_tokens=10).fingerprint() != DEFAULT_OPTIONS.fingerprint()
    assert DEFAULT_OPTIONS.fingerprint().startswith("tok")


def test_options_reject_nonsense() -> None:
    with pytest.raises(ValueError, match="max_parts"):
        TokenizerOptions(max_parts=0)
    with pytest.raises(ValueError, match="bigram_window"):
        TokenizerOptions(bigram_window=1)
