"""Bounded MLflow calls with typed errors: the layer under ``registry`` that every MLflow call of entivec goes through.

"Not found" and "invalid" answers of the store pass through as MLflow's own exceptions, for ``registry`` to turn
into None or a ``RegistryError`` naming what is missing; a store that does not answer (a closed port, a timeout,
a read-only or locked SQLite file, a server error) raises ``RegistryUnavailable`` with a one-line message naming
the server and the cause, within ``ENTIVEC_REGISTRY_TIMEOUT`` seconds (default 30).
"""

from __future__ import annotations

import logging
import os
import re
import sys
import threading
import time
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any
from urllib.parse import urlsplit

from entivec.settings import tracking_uri
from entivec.tasks.lifecycle import direct

TIMEOUT_VARIABLE = "ENTIVEC_REGISTRY_TIMEOUT"
DEFAULT_TIMEOUT = 30.0
# MLflow error codes that are answers about the request, not failures of the store.
ANSWER_CODES = {"RESOURCE_DOES_NOT_EXIST", "RESOURCE_ALREADY_EXISTS", "INVALID_PARAMETER_VALUE", "INVALID_STATE",
                "BAD_REQUEST", "NOT_FOUND", "ALREADY_EXISTS"}


class RegistryError(LookupError):
    """A name, version or alias that does not exist or is not well formed; the message says which."""


class RegistryUnavailable(RegistryError):
    """The tracking store did not answer (unreachable, timed out, read-only, locked, failed); retrying may help."""

    def __init__(self, message: str, server: str = "") -> None:
        super().__init__(message)
        self.server = server


def registry_timeout() -> float:
    """Seconds a registry call may take before the command gives up (``ENTIVEC_REGISTRY_TIMEOUT``, default 30)."""
    text = os.environ.get(TIMEOUT_VARIABLE, "").strip()
    if not text:
        return DEFAULT_TIMEOUT
    try:
        value = float(text)
    except ValueError:
        raise RegistryError(f"{TIMEOUT_VARIABLE}={text!r}: expected a number of seconds") from None
    if not value > 0:
        raise RegistryError(f"{TIMEOUT_VARIABLE}={text!r}: expected a positive number of seconds")
    return value


def server_label(uri: str | None = None) -> str:
    """The store's address for messages, without credentials."""
    uri = uri or tracking_uri()
    parts = urlsplit(uri)
    if parts.scheme.startswith("sqlite"):
        return uri
    host = parts.hostname or ""
    port = f":{parts.port}" if parts.port else ""
    return f"{parts.scheme}://{host}{port}{parts.path}" if host else uri


def _http_limits(budget: float) -> dict[str, str]:
    """MLflow's HTTP settings that keep one call within ``budget`` seconds: 3 attempts of a quarter each."""
    return {
        "MLFLOW_HTTP_REQUEST_MAX_RETRIES": "2",
        "MLFLOW_HTTP_REQUEST_BACKOFF_FACTOR": "1",
        "MLFLOW_HTTP_REQUEST_BACKOFF_JITTER": "0",
        "MLFLOW_HTTP_REQUEST_TIMEOUT": str(max(1, int(budget / 4))),
    }


_scope_lock = threading.Lock()
_scope_depth = 0
_saved_environment: dict[str, str | None] = {}
_streak = {"since": None, "last": None}  # monotonic times of the current run of failed calls


@contextmanager
def bounded() -> Iterator[None]:
    """MLflow's HTTP retry and timeout settings for the calls inside; the previous values come back after."""
    global _scope_depth
    limits = _http_limits(registry_timeout())
    with _scope_lock:
        if _scope_depth == 0:
            _saved_environment.clear()
            for key, value in limits.items():
                _saved_environment[key] = os.environ.get(key)
                os.environ[key] = value
        _scope_depth += 1
    try:
        yield
    finally:
        with _scope_lock:
            _scope_depth -= 1
            if _scope_depth == 0:
                for key, value in _saved_environment.items():
                    if value is None:
                        os.environ.pop(key, None)
                    else:
                        os.environ[key] = value


def _chain(exc: BaseException) -> Iterator[BaseException]:
    seen: set[int] = set()
    while exc is not None and id(exc) not in seen:
        seen.add(id(exc))
        yield exc
        exc = exc.__cause__ or exc.__context__


def failure_cause(exc: BaseException) -> str | None:
    """A short cause when ``exc`` means the store failed, or None when it is an answer (not found, invalid)."""
    import requests
    import sqlalchemy.exc

    for link in _chain(exc):
        text = str(link)
        if isinstance(link, sqlalchemy.exc.OperationalError) or "sqlite3.OperationalError" in text:
            lowered = text.lower()
            if "readonly" in lowered or "read-only" in lowered:
                return "the store is read-only (attempt to write a readonly database)"
            if "locked" in lowered:
                return "the store is locked by another writer (database is locked)"
            if "unable to open" in lowered:
                return "the store file cannot be opened (unable to open database file)"
            detail = re.search(r"\(sqlite3\.OperationalError\) ([^\n\[]+)", text)
            return f"the store failed ({(detail.group(1) if detail else type(link).__name__).strip()})"
        if isinstance(link, requests.exceptions.Timeout) or "timeout exception" in text:
            return "no answer within the time limit"
        if isinstance(link, requests.exceptions.ConnectionError) or "Max retries exceeded" in text:
            return "connection refused or failed" if "refused" in text.lower() else "the server cannot be reached"
        if isinstance(link, PermissionError):
            return f"permission denied ({link.filename or text})"
    if isinstance(exc, direct.StoreAnswer):
        return None
    if isinstance(exc, mlflow_error()):
        if exc.error_code in ANSWER_CODES:
            return None
        first = str(exc.message).strip().splitlines()[0] if str(exc.message).strip() else exc.error_code
        return f"the server answered {exc.error_code}: {first[:200]}"
    if isinstance(exc, OSError):
        return f"{type(exc).__name__}: {exc}"
    return None


def _unavailable(cause: str, uri: str) -> RegistryUnavailable:
    server = server_label(uri)
    return RegistryUnavailable(
        f"the tracking store {server} is unavailable: {cause} (gave up within {registry_timeout():g} s, "
        f"{TIMEOUT_VARIABLE})", server)


def guarded(call: Callable[..., Any], *args: Any, uri: str | None = None, **kwargs: Any) -> Any:
    """Run one MLflow call bounded in time; a store failure becomes ``RegistryUnavailable``, answers pass through."""
    uri = uri or tracking_uri()
    budget = registry_timeout()
    now = time.monotonic()
    since, last = _streak["since"], _streak["last"]
    if since is not None and now - since > budget and now - last < budget:
        raise _unavailable("it kept failing in this command", uri)
    try:
        with bounded():
            result = call(*args, **kwargs)
    except (RegistryError, KeyboardInterrupt, SystemExit):
        raise
    except Exception as exc:
        cause = failure_cause(exc)
        if cause is None:
            raise
        now = time.monotonic()
        if _streak["since"] is None or now - _streak["last"] >= budget:
            _streak["since"] = now
        _streak["last"] = now
        raise _unavailable(cause, uri) from exc
    _streak["since"] = _streak["last"] = None
    return result


class _QuietStoreErrors(logging.Filter):
    """MLflow logs a full traceback for every SQLite operational error, and urllib3 a warning for every retry of
    an HTTP call; ``RegistryUnavailable`` says it in one line instead."""

    def filter(self, record: logging.LogRecord) -> bool:
        text = str(record.msg)
        return not (text.startswith("SQLAlchemy database error") or text.startswith("Retrying ("))


_quiet = _QuietStoreErrors()


def mlflow_error() -> type[BaseException] | tuple[()]:
    """MLflow's exception class once MLflow is loaded; an empty tuple (matches nothing) before: an exception of
    MLflow cannot have been raised in a process that never imported it."""
    loaded = sys.modules.get("mlflow.exceptions")
    return loaded.MlflowException if loaded is not None else ()


def answer_types() -> tuple[type[BaseException], ...]:
    """The exceptions a store raises for "no such thing" or "invalid": the direct reader's and MLflow's."""
    error = mlflow_error()
    return (direct.StoreAnswer,) if error == () else (direct.StoreAnswer, error)


DIRECT_VARIABLE = "ENTIVEC_DIRECT_READS"  # "0" sends every read through MLflow
_direct: dict[str, Any] = {"on": False, "readers": {}}  # readers: one open DirectReader per store file


def _reader(path: Path) -> direct.DirectReader | None:
    """The direct reader of ``path`` opened once per process (its connection sees every committed write), or
    None when the file cannot be read directly."""
    key = str(path)
    if key not in _direct["readers"]:
        try:
            _direct["readers"][key] = direct.DirectReader(path)
        except direct.NotDirect:
            return None  # not remembered: the file may exist, or be migrated, by the next call
    return _direct["readers"][key]


def read_directly(on: bool = True) -> None:
    """Let this process answer registry reads from the SQLite file itself (``direct``); the read-only commands
    turn it on, unless ``ENTIVEC_DIRECT_READS=0``. Writes, and reads the direct reader cannot answer exactly,
    still go through MLflow."""
    _direct["on"] = on and os.environ.get(DIRECT_VARIABLE, "1").strip() not in ("0", "false", "no")
    if not _direct["on"]:
        for reader in _direct["readers"].values():
            reader.close()
        _direct["readers"].clear()


class Client:
    """An ``MlflowClient`` bound to one store whose every method runs through ``guarded``.

    With ``read_directly()`` and a SQLite store, the reads ``direct.DirectReader`` answers are served from the
    file without loading MLflow; the ``MlflowClient`` is made at the first call that needs it.
    """

    def __init__(self, uri: str, registry_uri: str) -> None:
        self.uri = uri
        self.registry_uri = registry_uri
        self._mlflow = None
        self._reader: direct.DirectReader | None = None
        path = direct.sqlite_path(uri)
        if _direct["on"] and path is not None and uri == registry_uri:
            self._reader = _reader(path)

    @property
    def _client(self) -> Any:
        if self._mlflow is None:
            from mlflow.tracking import MlflowClient

            self._mlflow = guarded(MlflowClient, tracking_uri=self.uri, registry_uri=self.registry_uri, uri=self.uri)
        return self._mlflow

    def __getattr__(self, attribute: str) -> Any:
        if attribute.startswith("__"):
            raise AttributeError(attribute)
        if self._reader is not None and attribute in direct.DirectReader.METHODS:
            answer = getattr(self._reader, attribute)

            def read(*args: Any, **kwargs: Any) -> Any:
                try:
                    return answer(*args, **kwargs)
                except direct.NotDirect:
                    return guarded(getattr(self._client, attribute), *args, uri=self.uri, **kwargs)

            return read
        value = getattr(self._client, attribute)
        if not callable(value):
            return value

        def call(*args: Any, **kwargs: Any) -> Any:
            return guarded(value, *args, uri=self.uri, **kwargs)

        return call

    def download_artifact(self, run_id: str, artifact_path: str, dst_path: str) -> str | None:
        """The direct reader's copy of a local artifact, or None when MLflow must fetch it."""
        if self._reader is None:
            return None
        try:
            return self._reader.download(run_id, artifact_path, dst_path)
        except direct.NotDirect:
            return None


def client() -> Client:
    """A client bound to the configured store (the embedded SQLite store unless ``MLFLOW_TRACKING_URI`` is set)."""
    uri = tracking_uri()
    if uri.startswith("sqlite:///"):
        Path(uri.removeprefix("sqlite:///")).parent.mkdir(parents=True, exist_ok=True)
    for logger in (logging.getLogger("mlflow.store.db.utils"), logging.getLogger("urllib3.connectionpool")):
        if _quiet not in logger.filters:
            logger.addFilter(_quiet)
    return Client(uri, os.environ.get("MLFLOW_REGISTRY_URI") or uri)


def download(*, uri: str | None = None, **kwargs: Any) -> str:
    """``mlflow.artifacts.download_artifacts`` against our store, bounded and typed like every other call.

    A run's artifact of a local store is copied from disk when this process reads directly (``read_directly``).
    """
    uri = uri or tracking_uri()
    run_id, artifact_path = kwargs.get("run_id"), kwargs.get("artifact_path")
    runs_uri = re.match(r"^runs:/([0-9a-f]+)/(.+)$", kwargs.get("artifact_uri") or "")
    if runs_uri is not None:
        run_id, artifact_path = runs_uri.groups()
    if _direct["on"] and run_id and artifact_path and kwargs.get("dst_path") and uri == tracking_uri():
        copied = client().download_artifact(run_id, artifact_path.strip("/"), kwargs["dst_path"])
        if copied is not None:
            return copied
    import mlflow.artifacts

    return guarded(mlflow.artifacts.download_artifacts, tracking_uri=uri, uri=uri, **kwargs)
