"""The ``mailweir`` command's entry point stays light: each tokenizer worker imports it again.

multiprocessing's forkserver workers re-import the parent's main script (as ``__mp_main__``).
When that script imported the whole command line, every worker held SQLAlchemy, aiohttp and
the SMTP side it never uses (41 MB PSS per worker against 15 MB after this change, measured
with 100 KB mail in bench/bench_relay.py).
"""

from __future__ import annotations

import subprocess
import sys
import tomllib
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[2]

# The script pip writes for a console entry point "module:function" (from memory of what pip
# generates; the installed one is checked against it below).
SCRIPT = """\
import sys
from mailweir.daemon.entry import main
if __name__ == "__main__":
    from mailweir.daemon.judge import make_executor
    with make_executor(1, "process") as pool:
        held = pool.submit(eval, "sorted({m.split('.')[0] for m in __import__('sys').modules})")
        print(" ".join(held.result(60)))
"""


def test_the_command_is_the_light_entry_point() -> None:
    scripts = tomllib.loads((ROOT / "pyproject.toml").read_text())["project"]["scripts"]
    assert scripts["mailweir"] == "mailweir.daemon.entry:main"
    installed = Path(sys.executable).with_name("mailweir")
    if installed.exists():
        assert "from mailweir.daemon.entry import main" in installed.read_text()


@pytest.mark.slow
def test_a_tokenizer_worker_imports_none_of_the_daemon(tmp_path: Path) -> None:
    script = tmp_path / "mailweir"
    script.write_text(SCRIPT)
    done = subprocess.run(
        [sys.executable, str(script)], capture_output=True, text=True, timeout=120, check=True
    )
    held = set(done.stdout.split())
    assert "numpy" in held  # the tokenizer's own, so the probe did run in a worker
    assert not held & {"sqlalchemy", "aiohttp", "aiosmtpd", "aiosmtplib", "prometheus_client"}
