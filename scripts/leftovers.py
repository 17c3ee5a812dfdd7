"""Fail when a process started by the check run is still running.

``scripts/check.sh`` exports ``PHASEWARD_CHECK_MARK`` before it starts any test; every process
started from there inherits it. Whatever still carries the mark when the run ends (apart from
this process and the shells that started it) was started and not stopped: a server left
serving, a browser left open. Usage: ``python scripts/leftovers.py MARK [--grace SECONDS]``.
"""

from __future__ import annotations

import argparse
import os
import sys
import time
from pathlib import Path

PROC = Path("/proc")


def _ancestors() -> set[int]:
    """This process and every process above it (the shells of the check run)."""
    seen, pid = set(), os.getpid()
    while pid > 1 and pid not in seen:
        seen.add(pid)
        try:
            stat = (PROC / str(pid) / "stat").read_text()
        except OSError:
            break
        pid = int(stat.rsplit(")", 1)[1].split()[1])
    return seen


def marked(mark: str) -> dict[int, str]:
    """Running processes whose environment carries ``PHASEWARD_CHECK_MARK=mark``: pid -> argv."""
    needle = f"PHASEWARD_CHECK_MARK={mark}".encode()
    mine = _ancestors()
    found: dict[int, str] = {}
    for entry in PROC.iterdir():
        if not entry.name.isdigit() or int(entry.name) in mine:
            continue
        try:
            if needle not in (entry / "environ").read_bytes().split(b"\0"):
                continue
            argv = (entry / "cmdline").read_bytes().replace(b"\0", b" ").decode(errors="replace")
        except OSError:  # gone meanwhile, or not ours to read
            continue
        if argv:  # a zombie has no command line and holds nothing
            found[int(entry.name)] = argv.strip()
    return found


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("mark", help="the value of PHASEWARD_CHECK_MARK the run exported")
    parser.add_argument(
        "--grace", type=float, default=10.0, help="seconds to let stopping processes exit"
    )
    args = parser.parse_args()
    deadline = time.monotonic() + args.grace
    while (left := marked(args.mark)) and time.monotonic() < deadline:
        time.sleep(0.5)
    for pid, argv in sorted(left.items()):
        print(f"leftover process {pid}: {argv[:200]}", file=sys.stderr)
    if left:
        print(f"{len(left)} processes started by the checks are still running: stop them "
              "where they are started", file=sys.stderr)  # fmt: skip
        return 1
    print("no leftover processes")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
