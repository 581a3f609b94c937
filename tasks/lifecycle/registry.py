"""The registry: every MLflow call of entivec, with "not found" as a value and "unreachable or failed" as an error.

Two kinds of answer come back from the tracking store. "There is no such model, version, alias or file" is an
ordinary answer: the functions here return None or an empty collection for it, or raise ``RegistryError`` with
a message naming what is missing when the caller asked for one thing by name. "The store did not answer" (a
closed port, a timeout, a read-only or locked SQLite file, a server error) raises ``RegistryUnavailable``, whose
one-line message names the server and the cause. No caller may read the second as the first: a production
version that cannot be looked up is not a missing production version.

Bounded time. Each call against an HTTP tracking server runs with MLflow's retry and timeout settings derived
from ``ENTIVEC_REGISTRY_TIMEOUT`` (seconds, default 30), set only while our call runs, so a dead server ends a
command within that time instead of after MLflow's own minutes of back-off. Once calls have failed for longer
than that, further calls in the same process fail at once until the budget has passed without a call.

Clients are bound to their URIs (``MlflowClient(tracking_uri=..., registry_uri=...)``); nothing here sets MLflow's
process-wide tracking or registry URI.
"""

from __future__ import annotations

import os
import re
import shutil
import socket
import tempfile
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path
from typing import TYPE_CHECKING

import yaml

from entivec.schemas.spec import MODEL_NAME_PATTERN, Spec, SpecError, spec_from_dict
from entivec.schemas.vector_set import VectorSet
from entivec.settings import artifact_root, project_home, tracking_uri
from entivec.tasks.lifecycle.store import (  # noqa: F401 - the registry's errors and calls, named from here
    TIMEOUT_VARIABLE,
    Client,
    RegistryError,
    RegistryUnavailable,
    answer_types,
    client,
    download,
    guarded,
    read_directly,
    registry_timeout,
    server_label,
)

if TYPE_CHECKING:  # MLflow is loaded when a call needs it, not by importing this module
    from mlflow.entities.model_registry import ModelVersion
    from mlflow.tracking import MlflowClient

STAGING = "staging"
PRODUCTION = "production"
ALIAS_PATTERN = re.compile(r"^[A-Za-z][A-Za-z0-9_-]{0,63}$")
VECTOR_SET_ARTIFACT = "vector_set"  # folder name inside the run and inside the registered model's artifacts
TAG_PREFIX = "entivec."

# Registration state of a version (intent first): created "registering", marked "complete" when its tags, alias
# and history entry are written. A version without the tag was registered before states existed.
STATE_TAG = f"{TAG_PREFIX}state"
REGISTERING = "registering"
COMPLETE = "complete"
OWNER_TAG = f"{TAG_PREFIX}registering_by"  # "host pid N since ISO-time": lets a later command judge it abandoned


class LifecycleError(RegistryError):
    """A lifecycle request that cannot be carried out as asked (no earlier production, blank reason, ...)."""


class IncompleteVersion(RegistryError):
    """A version whose registration never finished; it is refused until a lifecycle command settles it."""


def _is_answer(exc: BaseException, *codes: str) -> bool:
    return getattr(exc, "error_code", "") in (codes or ("RESOURCE_DOES_NOT_EXIST",))


@contextmanager
def ending_run(c: Client | MlflowClient, run_id: str) -> Iterator[str]:
    """Close a run made with the client: FINISHED when the block completes, FAILED (KILLED when the command was
    stopped by a signal or Ctrl-C) when it raises, then re-raised.

    A run left RUNNING after a crash would read as still in progress in every listing of the experiment.
    """
    try:
        yield run_id
    except BaseException as exc:
        status = "KILLED" if isinstance(exc, (KeyboardInterrupt, SystemExit)) else "FAILED"
        try:
            c.set_terminated(run_id, status=status)
        except RegistryError:
            pass  # the store is gone: the original error says more; the next command ends the run
        raise
    c.set_terminated(run_id, status="FINISHED")


def experiment_for(name: str) -> str:
    """The experiment that holds the runs of registered model ``name``; created with a local artifact root."""
    c = client()
    experiment_name = f"entivec/{name}"
    found = c.get_experiment_by_name(experiment_name)
    if found is not None:
        return found.experiment_id
    location = artifact_root() + f"/{name}" if tracking_uri().startswith("sqlite:") else None
    try:
        return c.create_experiment(experiment_name, artifact_location=location)
    except answer_types():  # created meanwhile by a concurrent run
        return c.get_experiment_by_name(experiment_name).experiment_id


def check_store(name: str) -> str:
    """Prove the store answers and takes writes before expensive work: writes a tag on the model's experiment,
    and ends the runs a killed earlier command left RUNNING.

    Returns the experiment id; raises ``RegistryUnavailable`` naming the server and the cause.
    """
    experiment_id = experiment_for(name)
    client().set_experiment_tag(experiment_id, f"{TAG_PREFIX}store_checked", datetime.now(UTC).isoformat())
    end_abandoned_runs(name)  # a train killed earlier may have left its run RUNNING
    return experiment_id


def check_name(name: str) -> str:
    if not re.match(MODEL_NAME_PATTERN, name or ""):
        raise RegistryError(
            f"model name {name!r} is not valid: use letters, digits, '_', '-' or '.', starting with a letter or digit"
        )
    return name


def check_alias(alias: str) -> str:
    if not ALIAS_PATTERN.match(alias or "") or alias.lower().startswith("v") and alias[1:].isdigit():
        raise RegistryError(
            f"alias {alias!r} is not valid: start with a letter, then letters, digits, '_' or '-' "
            "(and not 'v' followed by digits, which reads as a version)"
        )
    return alias


# --- "not found" as a value -------------------------------------------------------------------------------------


def find_model(name: str):
    """The registered model ``name``, or None when there is none."""
    try:
        return client().get_registered_model(check_name(name))
    except answer_types() as exc:
        if _is_answer(exc):
            return None
        raise


def find_version(name: str, number: str | int) -> ModelVersion | None:
    """Version ``number`` of ``name``, or None when either does not exist."""
    try:
        return client().get_model_version(check_name(name), str(number))
    except answer_types() as exc:
        if _is_answer(exc, "RESOURCE_DOES_NOT_EXIST", "INVALID_PARAMETER_VALUE"):
            return None
        raise


def find_alias(name: str, alias: str) -> ModelVersion | None:
    """The version ``alias`` points to, or None when the model or the alias does not exist."""
    check_alias(alias)
    try:
        return client().get_model_version_by_alias(check_name(name), alias)
    except answer_types() as exc:
        if _is_answer(exc, "RESOURCE_DOES_NOT_EXIST", "INVALID_PARAMETER_VALUE"):
            return None
        raise


def _missing_model(name: str) -> RegistryError:
    known = sorted(m.name for m in client().search_registered_models())
    hint = f"; registered: {', '.join(known)}" if known else "; nothing is registered yet"
    return RegistryError(f"no registered model named {name!r}{hint}")


def list_versions(name: str) -> list[ModelVersion]:
    """Every version of ``name``, newest first. An unknown name is an error that says so."""
    if find_model(name) is None:
        raise _missing_model(name)
    versions = client().search_model_versions(f"name = '{name}'")
    return sorted(versions, key=lambda v: int(v.version), reverse=True)


def aliases_of(name: str) -> dict[str, str]:
    """Alias -> version number for ``name``; empty when the model does not exist."""
    model = find_model(name)
    return {} if model is None else {alias: str(v) for alias, v in model.aliases.items()}


# --- registration state -----------------------------------------------------------------------------------------


def is_incomplete(mv: ModelVersion) -> bool:
    """True for a version whose registration was started and never finished."""
    return (mv.tags or {}).get(STATE_TAG) == REGISTERING


def owner_text() -> str:
    return f"{socket.gethostname()} pid {os.getpid()} since {datetime.now(UTC).isoformat(timespec='seconds')}"


STALE_AFTER_SECONDS = 3600  # a registration owned by another machine counts as abandoned after this long
RUN_OWNER_TAG = f"{TAG_PREFIX}process"  # "host pid" of the process that writes a run


def process_alive(pid: int) -> bool:
    """True when process ``pid`` of this machine runs (a zombie counts as dead; this machine's init may not reap)."""
    try:
        fields = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()
    except (OSError, IndexError):
        if not Path("/proc").is_dir():  # no procfs: ask the kernel
            try:
                os.kill(pid, 0)
            except ProcessLookupError:
                return False
            except PermissionError:
                return True
            return True
        return False
    return fields[0] not in ("Z", "X")


def _owner_alive(owner: str, since: datetime | None) -> bool:
    match = re.match(r"^(\S+) (?:pid )?(\d+)", owner or "")
    if match is None:
        return False
    host, pid = match.group(1), int(match.group(2))
    if host == socket.gethostname():
        return process_alive(pid)
    return since is not None and (datetime.now(UTC) - since).total_seconds() < STALE_AFTER_SECONDS


def registration_alive(mv: ModelVersion) -> bool:
    """True while the process that started an incomplete version may still finish it."""
    owner = (mv.tags or {}).get(OWNER_TAG, "")
    since = re.search(r"since (\S+)$", owner)
    try:
        started = datetime.fromisoformat(since.group(1)) if since else None
    except ValueError:
        started = None
    return _owner_alive(owner, started)


def end_abandoned_runs(name: str) -> list[str]:
    """End KILLED the runs of ``name``'s experiment left RUNNING by a process of this machine that is gone."""
    c = client()
    experiment = c.get_experiment_by_name(f"entivec/{name}")
    if experiment is None:
        return []
    ended = []
    for run in c.search_runs([experiment.experiment_id], "attributes.status = 'RUNNING'", max_results=200):
        owner = run.data.tags.get(RUN_OWNER_TAG, "")
        started = datetime.fromtimestamp(run.info.start_time / 1000, UTC)
        if owner and not _owner_alive(owner, started):
            c.set_tag(run.info.run_id, f"{TAG_PREFIX}ended_by", f"entivec: its process ({owner}) was gone")
            c.set_terminated(run.info.run_id, status="KILLED")
            ended.append(run.info.run_id)
    return ended


def _refuse_incomplete(name: str, mv: ModelVersion) -> None:
    if is_incomplete(mv):
        owner = (mv.tags or {}).get(OWNER_TAG, "an unknown process")
        raise IncompleteVersion(
            f"{name} version {mv.version} is incomplete: its registration (by {owner}) never finished, so it "
            "cannot be exported, applied or promoted; the next lifecycle command (e.g. `entivec history "
            f"{name}`) removes or completes it"
        )


def create_version(name: str, *, source: str, run_id: str, tags: dict[str, str]) -> str:
    """A new version of ``name`` (the model is created when missing), tagged ``registering`` with its other tags
    in the same call, so a crash at any later moment leaves a version every command recognises as incomplete."""
    c = client()
    if find_model(name) is None:
        try:
            c.create_registered_model(name)
        except answer_types() as exc:
            if not _is_answer(exc, "RESOURCE_ALREADY_EXISTS"):
                raise
    all_tags = {**tags, STATE_TAG: REGISTERING, OWNER_TAG: owner_text()}
    return str(c.create_model_version(name, source, run_id=run_id, tags=all_tags).version)


def mark_complete(name: str, version: str, note: str = "") -> None:
    """The last step of a registration (or of its repair): the version becomes usable."""
    c = client()
    if note:
        c.set_model_version_tag(name, str(version), f"{TAG_PREFIX}state_note", note[:4900])
    c.set_model_version_tag(name, str(version), STATE_TAG, COMPLETE)


def resolve(name: str, version_or_alias: str | int, *, allow_incomplete: bool = False) -> ModelVersion:
    """A version given as a number (``3``, ``v3``) or an alias (``staging``, ``production``).

    An incomplete version raises ``IncompleteVersion`` unless ``allow_incomplete``.
    """
    check_name(name)
    text = str(version_or_alias).strip()
    number = text[1:] if text.lower().startswith("v") and text[1:].isdigit() else text
    if number.isdigit():
        mv = find_version(name, number)
        if mv is None:
            versions = [str(v.version) for v in list_versions(name)]
            raise RegistryError(f"model {name!r} has no version {number}; versions: {', '.join(versions) or 'none'}")
    else:
        check_alias(text)
        mv = find_alias(name, text)
        if mv is None:
            list_versions(name)  # an unknown model name gets its own message
            aliases = sorted(aliases_of(name))
            raise RegistryError(f"model {name!r} has no alias {text!r}; aliases: {', '.join(aliases) or 'none'}")
    if not allow_incomplete:
        _refuse_incomplete(name, mv)
    return mv


@dataclass
class LoadedVersion:
    name: str
    version: str
    run_id: str
    vector_set: VectorSet
    folder: Path


def _cache_folder(name: str, version: str) -> Path:
    key = re.sub(r"[^A-Za-z0-9]+", "_", tracking_uri())[-80:]
    return project_home() / "cache" / key / name / version


def load_version(name: str, version_or_alias: str | int = PRODUCTION) -> LoadedVersion:
    """The vector set of one registered, complete version. Versions are immutable, so a local copy is cached."""
    mv = resolve(name, version_or_alias)
    version = str(mv.version)
    folder = _cache_folder(name, version)
    if not (folder / "vector_set.json").exists():
        project_home().mkdir(parents=True, exist_ok=True)
        with tempfile.TemporaryDirectory(dir=project_home()) as tmp:
            local = download(artifact_uri=f"runs:/{mv.run_id}/{VECTOR_SET_ARTIFACT}", dst_path=tmp)
            folder.parent.mkdir(parents=True, exist_ok=True)
            staged = Path(tmp) / "ready"
            shutil.copytree(local, staged)
            try:
                staged.rename(folder)
            except OSError:  # another process filled the cache first
                if not (folder / "vector_set.json").exists():
                    raise
    return LoadedVersion(name, version, mv.run_id, VectorSet.load(folder), folder)


def set_alias(name: str, alias: str, version: str) -> None:
    """Point ``alias`` at ``version``. (Audited moves for people go through the lifecycle flows.)"""
    check_alias(alias)
    client().set_registered_model_alias(name, alias, str(version))


def _artifact_exists(run_id: str, artifact: str) -> bool:
    parent, _, leaf = artifact.rstrip("/").rpartition("/")
    listed = client().list_artifacts(run_id, parent or None)
    return any(item.path.rstrip("/").rpartition("/")[2] == leaf for item in listed)


def run_file(run_id: str, artifact: str) -> Path | None:
    """A file of a run's artifacts, downloaded once into the project's cache (run artifacts do not change).

    None when the run has no such file; a store that cannot be read raises ``RegistryUnavailable``.
    """
    key = "".join(ch if ch.isalnum() else "_" for ch in tracking_uri())[-80:]
    target = project_home() / "cache" / key / "runs" / run_id
    local = target / artifact
    if local.exists():
        return local
    if not _artifact_exists(run_id, artifact):
        return None
    target.mkdir(parents=True, exist_ok=True)
    return Path(download(run_id=run_id, artifact_path=artifact, dst_path=str(target)))


def version_spec(version: LoadedVersion) -> Spec | None:
    """The spec (as resolved) a version was trained with, from its run."""
    path = run_file(version.run_id, "spec.resolved.yaml")
    if path is None or not path.exists():
        return None
    try:
        return spec_from_dict(yaml.safe_load(path.read_text(encoding="utf-8")), str(path))
    except SpecError:
        return None  # written by an older spec model; treated as unknown


def retry_on_unavailable(task, task_run, state) -> bool:
    """Prefect ``retry_condition_fn``: retry a task only when the store was unavailable (not on a wrong name)."""
    try:
        state.result()
    except RegistryUnavailable:
        return True
    except BaseException:  # noqa: BLE001 - any other failure is final
        return False
    return False
