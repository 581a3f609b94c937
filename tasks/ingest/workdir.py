"""A run's on-disk working set: one folder in the project folder, removed when the run ends however it ends.

A run that ends normally or by an exception removes its folder on the way out; SIGTERM and SIGINT are turned
into an exception first (by the command's own handler when it has one), so they do the same. A SIGKILL cannot
be caught: the folder then names its owner (pid and the process's start time), and the next run that opens a
working set removes every folder whose owner is gone (a dead or zombie process, or a pid reused by another
process).
"""

from __future__ import annotations

import json
import os
import shutil
import signal
import tempfile
import threading
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path

from entivec.settings import project_home

WORKSETS = "workset"
OWNER = "owner.json"


def _start_time(pid: int) -> str | None:
    """The process's start time in clock ticks since boot (field 22 of /proc/PID/stat), None when it is gone.

    A zombie counts as gone: this machine's init does not reap orphans, so "alive" is judged by the state field.
    """
    try:
        text = Path(f"/proc/{pid}/stat").read_text()
    except OSError:
        return None
    fields = text.rpartition(")")[2].split()
    if not fields or fields[0] in ("Z", "X"):
        return None
    return fields[19]


def worksets_folder() -> Path:
    return project_home() / WORKSETS


def remove_stale_worksets(folder: Path | None = None) -> list[Path]:
    """Remove working sets whose owning process is gone; return what was removed."""
    folder = folder or worksets_folder()
    removed = []
    if not folder.is_dir():
        return removed
    for entry in sorted(folder.iterdir()):
        try:
            owner = json.loads((entry / OWNER).read_text(encoding="utf-8"))
            alive = _start_time(int(owner["pid"])) == owner["started"]
        except (OSError, ValueError, KeyError, TypeError):
            alive = False  # no readable owner: a folder killed before it was stamped
        if not alive:
            shutil.rmtree(entry, ignore_errors=True)
            removed.append(entry)
    return removed


class _Stopped(SystemExit):
    """SIGTERM or SIGINT arrived while a working set was open."""


@contextmanager
def _signals_raise() -> Iterator[None]:
    if threading.current_thread() is not threading.main_thread():
        yield  # only the main thread can install handlers; the caller's finally still cleans up on exceptions
        return

    def stop(signum, frame):  # noqa: ARG001 - the signal API's signature
        raise _Stopped(128 + signum)

    # A handler of the caller's own (the command's, which raises its Stopped so the registration transaction and
    # MLflow runs unwind as it expects) already turns the signal into an exception: it stays; only the default
    # handlers, which would end the process without running the clean-up, are replaced.
    defaults = (signal.SIG_DFL, signal.default_int_handler, None)
    previous = {s: signal.signal(s, stop) for s in (signal.SIGTERM, signal.SIGINT)
                if signal.getsignal(s) in defaults}
    try:
        yield
    finally:
        for s, handler in previous.items():
            signal.signal(s, handler)


@contextmanager
def working_set(label: str = "run", folder: Path | None = None) -> Iterator[Path]:
    """A fresh working folder for one run, stamped with its owner; stale ones of killed runs are removed first."""
    base = folder or worksets_folder()
    base.mkdir(parents=True, exist_ok=True)
    remove_stale_worksets(base)
    path = Path(tempfile.mkdtemp(prefix=f"{label}-", dir=base))
    try:
        (path / OWNER).write_text(json.dumps({"pid": os.getpid(), "started": _start_time(os.getpid())}),
                                  encoding="utf-8")
        with _signals_raise():
            yield path
    finally:
        shutil.rmtree(path, ignore_errors=True)


def size_on_disk(path: Path) -> int:
    """Bytes of the files under ``path``."""
    return sum(p.stat().st_size for p in path.rglob("*") if p.is_file())
