"""Named crash points in the write path, so tests can kill a run exactly where it hurts.

``crash_point("points.renamed")`` does nothing unless the environment of the process says
otherwise, and then costs one global lookup. Two variables drive it (read once, at import):

* ``SCANSHELF_CRASH_AT=<name>:<n>`` — the n-th time (1-based) the point ``name`` is reached,
  the process kills itself with SIGKILL: no ``finally``, no flush, no atexit, like a power cut
  or an OOM kill.
* ``SCANSHELF_CRASH_LOG=<file>`` — append the name of every point reached, one a line, so a
  harness can first count the points of a clean run and then kill at each of them.

A harness that forks pre-imported workers (imports cost seconds, a small run less) sets the
same two things in the child with :func:`configure`.
"""

from __future__ import annotations

import os
import signal

CRASH_AT = "SCANSHELF_CRASH_AT"
CRASH_LOG = "SCANSHELF_CRASH_LOG"
KILLED_MARK = "scanshelf: killed itself at crash point"


def _plan(text: str | None) -> tuple[str, int] | None:
    if not text:
        return None
    name, _, n = text.rpartition(":")
    if not name or not n.isdigit() or int(n) < 1:
        raise ValueError(f"{CRASH_AT}={text!r}: expected <point name>:<count from 1>, e.g. points.renamed:2")
    return name, int(n)


_PLAN = _plan(os.environ.get(CRASH_AT))
_LOG = os.environ.get(CRASH_LOG) or None
_ACTIVE = _PLAN is not None or _LOG is not None
_seen: dict[str, int] = {}


def configure(at: str | None = None, log: str | None = None) -> None:
    """Arm (or, with no arguments, disarm) the crash points of this process; same forms as the variables."""
    global _PLAN, _LOG, _ACTIVE
    _PLAN, _LOG = _plan(at), log or None
    _ACTIVE = _PLAN is not None or _LOG is not None
    _seen.clear()


def crash_point(name: str) -> None:
    """A place where a kill must leave the shelf resumable; see the module docstring."""
    if not _ACTIVE:
        return
    if _LOG is not None:
        with open(_LOG, "a", encoding="utf-8") as fh:
            fh.write(name + "\n")
    if _PLAN is not None and _PLAN[0] == name:
        _seen[name] = _seen.get(name, 0) + 1
        if _seen[name] == _PLAN[1]:
            # Last words on the raw descriptor (no buffer to lose), so a harness can tell this
            # kill from a crash even when its process-status channel fails under load.
            os.write(2, f"{KILLED_MARK} {name}:{_PLAN[1]}\n".encode())
            os.kill(os.getpid(), signal.SIGKILL)
