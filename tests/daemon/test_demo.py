"""The quick start's first command: the demo must keep working end to end."""

from __future__ import annotations

import re
from pathlib import Path

import pytest

from mailweir.daemon import scenario
from mailweir.daemon.demo import read_landed, run_demo


@pytest.mark.slow
async def test_demo_delivers_ham_quarantines_spam_and_learns_a_correction(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    run_dir = tmp_path / "demo"
    assert await run_demo(run_dir, http_port=0, keep_running=False) == 0
    out = capsys.readouterr().out

    landed = read_landed(run_dir / "maildirs")
    morning = scenario.incoming()
    # Every message delivered exactly once somewhere, plus the reminder sent again after the
    # correction; the forward to the feedback address is consumed, never delivered.
    assert len(landed) == len(morning) + 1
    for message in morning:
        where = next(v for k, v in landed.items() if k and k in message.raw.decode())
        if message.label == "spam":
            assert where.mailbox == scenario.QUARANTINE
            assert where.message["Mailweir-Original-Recipients"]
        else:
            assert where.mailbox == message.recipients[0]
        assert where.message["Mailweir-Verdict"] in {"ham", "suspect", "spam"}

    assert "Correction stored" in out
    found = re.search(r"now scores ([\d.]+) .*it scored ([\d.]+)", out)
    assert found is not None
    after, before = map(float, found.groups())
    assert after < before
    assert re.search(r"Status page: http://127\.0\.0\.1:\d+/", out)
    assert re.search(r"5\. 5 rerouted messages are held as they arrived", out)
