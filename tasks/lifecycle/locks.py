"""The per-model lifecycle lock that every alias move and history write holds.

Two kinds, chosen by the tracking store (or ``ENTIVEC_LIFECYCLE_LOCK``: auto, file or registry):

- SQLite store (the embedded default): an exclusive ``fcntl`` lock on a file next to the database. The
  operating system releases it when its process dies, so a crash never leaves it held. Exact for every
  process on the machine; the store file must not be shared over a network file system whose locks are
  unreliable (e.g. some NFS set-ups).
- Any other backend: a lease, i.e. a registered model named ``<name>.entivec-lease`` created for the
  duration. Creating a registered model whose name exists fails atomically in the store's database (a
  unique key), so two clients cannot both hold it. A lease left by a crashed client expires after
  ``LEASE_SECONDS`` and the next client breaks it; a client stalled longer than that while holding it
  could overlap with the breaker (the critical section is a handful of registry calls, far shorter). The
  lease shows in the registry's model list while held.
"""

from __future__ import annotations

import contextlib
import os
import socket
import time
import uuid
from collections.abc import Iterator
from datetime import UTC, datetime, timedelta
from pathlib import Path

from entivec.settings import tracking_uri
from entivec.tasks.lifecycle import registry
from entivec.tasks.lifecycle.stamps import now_iso, operator

try:  # POSIX only; elsewhere the registry lease is used
    import fcntl
except ImportError:  # pragma: no cover - Windows
    fcntl = None  # type: ignore[assignment]

LEASE_SUFFIX = ".entivec-lease"
LEASE_SECONDS = 600
LOCK_MODE_VARIABLE = "ENTIVEC_LIFECYCLE_LOCK"  # auto (default) | file | registry


class AuditError(RuntimeError):
    """The history could not be written consistently (a lock not obtained, a concurrent change)."""




def _lock_mode() -> str:
    mode = os.environ.get(LOCK_MODE_VARIABLE, "auto").strip().lower()
    if mode not in ("auto", "file", "registry"):
        raise AuditError(f"{LOCK_MODE_VARIABLE}={mode!r}: expected auto, file or registry")
    uri = tracking_uri()
    if mode == "auto":
        return "file" if uri.startswith("sqlite:///") and fcntl is not None else "registry"
    if mode == "file" and (not uri.startswith("sqlite:///") or fcntl is None):
        raise AuditError("a file lock needs a local SQLite tracking store on a POSIX system")
    return mode


def _holder() -> str:
    return f"{operator()}@{socket.gethostname()} pid {os.getpid()}"


@contextlib.contextmanager
def _file_lock(name: str, timeout: float) -> Iterator[None]:
    db = Path(tracking_uri().removeprefix("sqlite:///"))
    db.parent.mkdir(parents=True, exist_ok=True)
    path = db.with_name(f"{db.name}.lifecycle-{name}.lock")
    with open(path, "a+", encoding="utf-8") as handle:
        deadline = time.monotonic() + timeout
        while True:
            try:
                fcntl.flock(handle.fileno(), fcntl.LOCK_EX | fcntl.LOCK_NB)
                break
            except BlockingIOError:
                if time.monotonic() > deadline:
                    handle.seek(0)
                    raise AuditError(
                        f"model {name!r} is locked by another lifecycle command ({handle.read().strip() or 'unknown'})"
                        f"; waited {timeout:.0f} s"
                    ) from None
                time.sleep(0.05)
        try:
            handle.seek(0)
            handle.truncate()
            handle.write(f"{_holder()} since {now_iso()}\n")
            handle.flush()
            yield
        finally:
            fcntl.flock(handle.fileno(), fcntl.LOCK_UN)


@contextlib.contextmanager
def _registry_lease(name: str, timeout: float) -> Iterator[None]:
    c = registry.client()
    lease = f"{name}{LEASE_SUFFIX}"
    token = uuid.uuid4().hex
    deadline = time.monotonic() + timeout
    while True:
        expires = (datetime.now(UTC) + timedelta(seconds=LEASE_SECONDS)).isoformat(timespec="seconds")
        try:
            c.create_registered_model(
                lease,
                tags={
                    "entivec.lease.token": token,
                    "entivec.lease.expires": expires,
                    "entivec.lease.holder": _holder(),
                },
                description=f"entivec lifecycle lease of model {name!r}; removed when released",
            )
            break
        except registry.answer_types() as exc:
            # Taken: the store reports the name as existing, or (MLflow looks the holder up to word its
            # message) as already gone again when the holder released it meanwhile. Either way: wait, retry.
            if exc.error_code not in ("RESOURCE_ALREADY_EXISTS", "RESOURCE_DOES_NOT_EXIST"):
                raise
        _break_stale_lease(lease)
        if time.monotonic() > deadline:
            raise AuditError(f"model {name!r} is locked by another lifecycle command (lease {lease!r}); "
                             f"waited {timeout:.0f} s")
        time.sleep(0.1)
    try:
        yield
    finally:
        with contextlib.suppress(*registry.answer_types()):
            if c.get_registered_model(lease).tags.get("entivec.lease.token") == token:
                c.delete_registered_model(lease)


def _break_stale_lease(lease: str) -> None:
    c = registry.client()
    try:
        tags = c.get_registered_model(lease).tags
    except registry.answer_types():
        return  # released meanwhile
    expires = tags.get("entivec.lease.expires")
    if expires and datetime.fromisoformat(expires) < datetime.now(UTC):
        with contextlib.suppress(*registry.answer_types()):
            # Only the lease seen stale is removed: a fresh one carries another token.
            if c.get_registered_model(lease).tags.get("entivec.lease.token") == tags.get("entivec.lease.token"):
                c.delete_registered_model(lease)


@contextlib.contextmanager
def lifecycle_lock(name: str, timeout: float) -> Iterator[None]:
    """Hold ``name``'s lock: a file lock on a SQLite store, a registry lease on any other backend."""
    lock = _file_lock if _lock_mode() == "file" else _registry_lease
    with lock(name, timeout):
        yield
