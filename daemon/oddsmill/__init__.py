"""oddsmill: an online logistic-regression daemon.

The learner (`oddsmill.learner`) learns each labelled event by stochastic gradient ascent on the
log-likelihood; the reference fit (`oddsmill.reference`) maximises the same objective by Newton's
method; storage, the replay engine and the command line sit around them.
"""

from __future__ import annotations

import hashlib
import signal
import threading
import time
from pathlib import Path
from typing import Any

__version__ = "0.1.0"

_HERE = Path(__file__).resolve().parent
# numba keys each cached function by the text of its own file only, so a function compiled with
# another module's code in it (intake._serve with quick._journal_and_learn, quick's with the
# kernel's) would be loaded stale after that other module changed: it happened here, in
# development, and an upgrade that leaves the old __pycache__ behind would do it too. The
# package's functions are cached under one stamp, the hash of all its sources: any change compiles
# them all again, once.
PACKAGE_STAMP = hashlib.sha256(
    b"".join(p.name.encode() + p.read_bytes() for p in sorted(_HERE.glob("*.py")))
).hexdigest()


def _stamp_the_cache() -> None:
    from numba.core import caching

    def ours(base: Any) -> Any:
        class PackageLocator(base):  # type: ignore[misc]
            @classmethod
            def from_function(cls, py_func: Any, py_file: str) -> Any:
                if Path(py_file).resolve().parent != _HERE:
                    return None
                return super().from_function(py_func, py_file)

            def get_source_stamp(self) -> str:
                return PACKAGE_STAMP

        return PackageLocator

    classes = caching.CacheImpl._locator_classes
    if not any(getattr(c, "__qualname__", "").endswith("PackageLocator") for c in classes):
        kinds = (caching.UserProvidedCacheLocator, caching.InTreeCacheLocator, caching.UserWideCacheLocator)
        classes[:0] = [ours(kind) for kind in kinds]  # (NUMBA_CACHE_DIR's, then __pycache__, then the user's)


_stamp_the_cache()

COMPILING = (
    "compiling the learner's code for this machine, once: up to about two minutes on 2 cores, with "
    "nothing more to see until it ends (numba keeps it in the package's __pycache__ for the runs after)"
)

# A compile is announced only once it has run this long: numba compiles a small function now and
# then on a warm cache too (a new type of argument), in a second or less, and the line's "two
# minutes" was then untrue.
SAY_AFTER = 1.5


def _say_when_compiling() -> None:
    """Log COMPILING (logger "oddsmill", INFO) once one compile (numba's functions compiled rather
    than loaded from the cache: a function and those it calls) has run for SAY_AFTER seconds. On a
    fresh machine the first command (`oddsmill demo`, as the README says) compiles the whole
    package, and said nothing for two minutes. numba's "numba:compile" event fires only on a cache
    miss; the line is said once a process."""
    import logging

    from numba.core import event

    class FirstCompile(event.Listener):
        said = False
        depth = 0  # (a compile may start others inside it)
        began = 0.0
        handler: Any = None  # SIGINT's handler before the compile, in the main thread
        timer: threading.Timer | None = None

        def say(self) -> None:
            # On the timer's thread: numba's compiler lets go of the GIL in LLVM's calls.
            if self.depth > 0 and not self.said:
                self.said = True
                logging.getLogger("oddsmill").info(COMPILING)

        def on_start(self, ev: Any) -> None:
            self.depth += 1
            if self.depth == 1:
                self.began = time.monotonic()
                if not self.said:
                    self.timer = threading.Timer(SAY_AFTER, self.say)
                    self.timer.daemon = True
                    self.timer.start()
                # (a handler that raises nothing, `serve`'s, is safe there and is kept)
                main = threading.current_thread() is threading.main_thread()
                if main and not getattr(signal.getsignal(signal.SIGINT), "safe_while_compiling", False):
                    self.handler = signal.signal(signal.SIGINT, _interrupted_compiling)

        def on_end(self, ev: Any) -> None:
            global _compiling
            self.depth -= 1
            if self.depth == 0:
                _compiling += time.monotonic() - self.began
                if self.timer is not None:
                    self.timer.cancel()
                if self.handler is not None:
                    signal.signal(signal.SIGINT, self.handler)
                    self.handler = None

    event.register("numba:compile", FirstCompile())  # type: ignore[no-untyped-call]


_compiling = 0.0


def _interrupted_compiling(signum: int, _frame: Any) -> None:
    """Ctrl-C while numba compiles (the first command's two minutes): raised there, the interrupt
    could land in a callback of numba's compiler and come out as a page of traceback ("no compiled
    object yet"). The process stops at once instead, as a kill would stop it (every file the
    package writes is safe against that), with 130, as the shell expects of an interrupt."""
    import logging
    import os

    logging.getLogger("oddsmill").info("interrupted while compiling: stopped")
    logging.shutdown()
    os._exit(128 + signum)


def compile_seconds() -> float:
    """The seconds this process has spent compiling numba's functions (not loading them from the
    cache): what a command that reports a rate leaves out of it."""
    return _compiling


_say_when_compiling()
