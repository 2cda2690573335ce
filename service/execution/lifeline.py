"""Worker processes die with the process that started them.

:func:`die_with_parent` is called first thing in a worker process (queue worker, local compute
child, API process under ``serve --workers N``): on Linux it asks the kernel for SIGKILL when
the parent goes (``prctl(PR_SET_PDEATHSIG)``, through ctypes), and on every system a daemon
thread polls the parent pid once a second and ends the process when it changed (the parent died
and the process was adopted). So a server killed with SIGKILL leaves no worker computing rows
nobody records.

The kernel ties PR_SET_PDEATHSIG to the *thread* that started the child, so a parent that
starts a child from a short-lived thread passes ``kernel=False`` and relies on the poll.
"""

from __future__ import annotations

import ctypes
import os
import signal
import sys
import threading
from typing import Callable

__all__ = ["die_with_parent", "PR_SET_PDEATHSIG"]

#: from <linux/prctl.h>
PR_SET_PDEATHSIG = 1


def _set_pdeathsig(sig: int) -> bool:
    if not sys.platform.startswith("linux"):
        return False
    try:
        libc = ctypes.CDLL(None, use_errno=True)
        return libc.prctl(PR_SET_PDEATHSIG, int(sig), 0, 0, 0) == 0
    except (OSError, AttributeError):  # no libc with prctl: the poll still works
        return False


def die_with_parent(parent_pid: int, *, kernel: bool = True, sig: int = signal.SIGKILL, interval: float = 1.0,
                    on_orphan: Callable[[], None] | None = None) -> None:
    """End this process when ``parent_pid`` (its parent) is gone.

    kernel: ask Linux for ``sig`` at the parent's death (default SIGKILL); poll: every
    ``interval`` s compare ``os.getppid()`` with ``parent_pid``; when they differ call
    ``on_orphan`` (default: ``os._exit(1)``)."""
    if kernel:
        _set_pdeathsig(sig)
    act = on_orphan or (lambda: os._exit(1))
    if os.getppid() != parent_pid:  # the parent died before the request above took effect
        act()
        return

    def watch() -> None:
        while True:
            threading.Event().wait(interval)
            if os.getppid() != parent_pid:
                act()
                return

    threading.Thread(target=watch, name="toposcout-lifeline", daemon=True).start()
