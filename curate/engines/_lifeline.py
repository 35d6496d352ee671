"""Linux: tie a helper process's life to its parent's, so a SIGKILLed run leaves no orphans.

The local engine's forkserver imports this module as a preload (which ties the
forkserver to the run's main process), and each worker calls `die_with_parent`
as its initializer (which ties it to the forkserver). Elsewhere it does nothing.
"""
from __future__ import annotations

import os
import signal
import sys

_PR_SET_PDEATHSIG = 1  # prctl(2) option: signal sent to this process when its parent dies


def die_with_parent() -> None:
    if not sys.platform.startswith("linux"):
        return
    import ctypes

    try:
        libc = ctypes.CDLL(None, use_errno=True)
        libc.prctl(_PR_SET_PDEATHSIG, signal.SIGKILL)
    except (OSError, AttributeError):
        return
    if os.getppid() == 1:  # the parent died before we asked
        os._exit(0)

