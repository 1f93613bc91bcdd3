"""Worker processes that die with the command that started them.

Labels and letters of a large round are drawn in a pool of processes. If the
command is killed (kill -9, a closed terminal, an out-of-memory kill), its
workers must not live on and keep writing into the round folder: each worker
asks the kernel to kill it when its parent dies (Linux: ``PR_SET_PDEATHSIG``)
and, on every system, watches its parent's pid from a daemon thread and exits
at once when it changes. Exiting is safe: every document is written to a
temporary file and renamed into place only when complete.

Workers draw in the fonts their parent chose (``_layout.use_fonts``), also where
they start as fresh processes rather than forks.
"""

from __future__ import annotations

import os
import sys
import threading
import time
from collections.abc import Callable
from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:
    from concurrent.futures import ProcessPoolExecutor

    from planner.fonts import FontSet

__all__ = ["POLL_SECONDS", "pool"]

POLL_SECONDS = 0.2
"""How often a worker looks whether its parent is still there."""

_PR_SET_PDEATHSIG = 1


def _die_with(parent: int) -> None:
    if sys.platform.startswith("linux"):
        try:
            import ctypes
            import signal

            libc = ctypes.CDLL(None, use_errno=True)
            libc.prctl(_PR_SET_PDEATHSIG, int(signal.SIGKILL), 0, 0, 0)
        except (OSError, AttributeError):
            pass  # the watcher below still works
    if os.getppid() != parent:  # the parent died before the request took effect
        os._exit(1)

    def watch() -> None:
        while True:
            time.sleep(POLL_SECONDS)
            if os.getppid() != parent:
                os._exit(1)

    threading.Thread(target=watch, name="ringplan-parent-watch", daemon=True).start()


def _start(parent: int, fonts: FontSet | None, initializer: Callable[..., Any] | None,
           initargs: tuple[Any, ...]) -> None:
    _die_with(parent)
    if fonts is not None:
        from planner.render import _layout

        _layout.use_fonts(fonts)
    if initializer is not None:
        initializer(*initargs)


def pool(workers: int, *, initializer: Callable[..., Any] | None = None,
         initargs: tuple[Any, ...] = (), fork: bool = False) -> ProcessPoolExecutor:
    """Return a process pool of ``workers`` whose processes exit when this process dies.

    ``fork`` asks for the fork start method where the system has it (the workers then
    share the parent's memory instead of receiving ``initargs`` pickled).
    """
    import multiprocessing
    from concurrent.futures import ProcessPoolExecutor

    from planner.render import _layout

    context = None
    if fork and "fork" in multiprocessing.get_all_start_methods():
        context = multiprocessing.get_context("fork")
    return ProcessPoolExecutor(max_workers=workers, mp_context=context, initializer=_start,
                               initargs=(os.getpid(), _layout.chosen_fonts(), initializer,
                                         initargs))
