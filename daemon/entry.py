"""The ``mailweir`` command's entry point, light on purpose.

The tokenizer pool starts its workers with multiprocessing's forkserver, and every worker
imports the parent's main script again (as ``__mp_main__``).  The script pip writes for the
``mailweir`` command imports the module named in pyproject.toml; were that the command line
itself (``cli.py``), each worker would import the whole daemon (SQLAlchemy, aiohttp, the SMTP
side) and hold about 26 MB more than the tokenizer needs (bench/bench_relay.py, 100 KB mail).
"""

from __future__ import annotations


def main() -> int:
    from mailweir.daemon.cli import main as command_line

    return command_line()
