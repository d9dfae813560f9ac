"""Fault injection for the crash tests: stop the run at a named point, as a crash would.

Test-only. :func:`maybe_fail` does nothing unless ``KIDNEYSURV_FAULT_AT`` names the point it is
called with; then, by ``KIDNEYSURV_FAULT_KIND``:

- ``kill`` (the default): the process sends itself SIGKILL, which cannot be caught or cleaned
  up after, like a power cut or the out-of-memory killer;
- ``stop``: the process sends itself SIGSTOP and waits, holding whatever it holds, until a
  SIGCONT (the concurrent-run test);
- ``enospc``: an ``OSError`` "No space left on device" is raised, as a full disk would (where a
  size-limited file system cannot be mounted).

Points are ``<stage>:before`` and ``<stage>:after`` for every stage of the flow (scan, ingest,
validate, measure, link, summarise, export, publish) and the steps of the month's publication in
:mod:`pipeline.run.runlock` (``publish:journal``, ``publish:committed``, ``publish:moved``), and of
a reprocess in :mod:`pipeline.run.reprocess` (``reprocess:replaced``, ``reprocess:before_commit``).
"""

from __future__ import annotations

import errno
import os
import signal

FAULT_ENV = "KIDNEYSURV_FAULT_AT"
KIND_ENV = "KIDNEYSURV_FAULT_KIND"


def maybe_fail(point: str) -> None:
    """Crash here if the environment asks for it (tests only); otherwise return at once."""
    wanted = os.environ.get(FAULT_ENV)
    if not wanted or wanted.strip() != point:
        return
    kind = os.environ.get(KIND_ENV, "kill").strip()
    if kind == "stop":
        os.kill(os.getpid(), signal.SIGSTOP)
        return
    if kind == "enospc":
        raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC), f"(fault injected at {point})")
    os.kill(os.getpid(), signal.SIGKILL)
