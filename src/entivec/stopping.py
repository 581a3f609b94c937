"""How a command ends when it is told to stop: SIGTERM and SIGINT end it cleanly, and no temporary server outlives it.

A scheduler or container stop sends SIGTERM, a person presses Ctrl-C (SIGINT). Both raise ``Stopped`` (a
``SystemExit`` with code 128 + signal number: 143 and 130, the shell's convention) in the main thread, so
every ``with`` block on the way out runs: MLflow runs end KILLED (``registry.ending_run``), the registration
transaction deletes a version it created, Prefect marks the flow run crashed, and the temporary Prefect server
is stopped by Prefect's own exit hook. The command then leaves without waiting for worker threads still
training a fold.

SIGKILL cannot be caught. For it, the temporary Prefect server (a child process that Prefect starts when no
``PREFECT_API_URL`` is set) gets a watcher thread: when its parent is gone it stops itself. What a killed
registration leaves behind is settled by the next lifecycle command (``tasks/lifecycle/audit.py``).
"""

from __future__ import annotations

import atexit
import os
import signal
import sys
import types
from typing import Any

HANDLED = (signal.SIGTERM, signal.SIGINT)

# Runs the Prefect server's uvicorn inside a process that watches its parent (argv[1] holds the parent's pid).
SERVER_GUARD = """
import os, runpy, signal, sys, threading, time
parent = int(sys.argv.pop(1))
def watch():
    while os.getppid() == parent:
        time.sleep(0.5)
    os.kill(os.getpid(), signal.SIGTERM)
    time.sleep(10)
    os._exit(1)
threading.Thread(target=watch, daemon=True, name="entivec-parent-watch").start()
sys.argv[0] = "uvicorn"
runpy.run_module("uvicorn", run_name="__main__", alter_sys=True)
"""


class Stopped(SystemExit):
    """The command was told to stop by a signal; ``code`` is 128 + the signal number."""

    def __init__(self, signum: int) -> None:
        super().__init__(128 + signum)
        self.signum = signum

    @property
    def signal_name(self) -> str:
        return signal.Signals(self.signum).name


def _raise_stopped(signum: int, frame: Any) -> None:
    # Later signals while the first one unwinds are ignored: the clean-up under way must be allowed to finish.
    for handled in HANDLED:
        signal.signal(handled, signal.SIG_IGN)
    raise Stopped(signum)


def install() -> None:
    """SIGTERM and SIGINT raise ``Stopped``; the temporary Prefect server is guarded against a killed parent."""
    for handled in HANDLED:
        signal.signal(handled, _raise_stopped)
    guard_temporary_server()


class _GuardedSubprocess(types.ModuleType):
    """``subprocess`` as Prefect's server module sees it: the uvicorn it starts runs under ``SERVER_GUARD``."""

    def __init__(self, real: types.ModuleType) -> None:
        super().__init__("subprocess")
        self._real = real

    def __getattr__(self, attribute: str) -> Any:
        return getattr(self._real, attribute)

    def Popen(self, args, *rest, **kwargs):  # noqa: N802 - the name Prefect calls
        args = list(args)
        if args[1:3] == ["-m", "uvicorn"]:
            args = [args[0], "-c", SERVER_GUARD, str(os.getpid()), *args[3:]]
        return self._real.Popen(args, *rest, **kwargs)


_SERVER_MODULE = "prefect.server.api.server"


class _GuardOnImport:
    """A meta-path finder that guards Prefect's server module when something first imports it.

    Importing it here would cost every command Prefect's import time (seconds), including those that only read
    the registry and never start a server.
    """

    def find_spec(self, name: str, path: Any = None, target: Any = None) -> Any:
        if name != _SERVER_MODULE:
            return None
        import importlib.util

        sys.meta_path.remove(self)
        spec = importlib.util.find_spec(name)
        if spec is None or spec.loader is None:
            return spec
        run_module = spec.loader.exec_module

        def exec_module(module: types.ModuleType) -> None:
            run_module(module)
            _guard(module)

        spec.loader.exec_module = exec_module
        return spec


def _guard(server: types.ModuleType) -> None:
    if not isinstance(server.subprocess, _GuardedSubprocess):
        server.subprocess = _GuardedSubprocess(server.subprocess)


def guard_temporary_server() -> None:
    """Make the temporary Prefect server stop itself when the process that started it dies (even by SIGKILL):
    at once when Prefect's server module is loaded, else as soon as something loads it."""
    if _SERVER_MODULE in sys.modules:
        _guard(sys.modules[_SERVER_MODULE])
    elif not any(isinstance(finder, _GuardOnImport) for finder in sys.meta_path):
        sys.meta_path.insert(0, _GuardOnImport())


def finish(stop: Stopped) -> None:
    """Leave after a signal: exit hooks run (they stop the temporary server), worker threads are not awaited."""
    sys.stdout.flush()
    sys.stderr.flush()
    atexit._run_exitfuncs()
    os._exit(stop.code)
