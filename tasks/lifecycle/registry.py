"""The registry: MLflow client access, version and alias resolution, and loading a registered vector set."""

from __future__ import annotations

import re
import shutil
import tempfile
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path

import mlflow
import yaml
from mlflow.entities.model_registry import ModelVersion
from mlflow.exceptions import MlflowException
from mlflow.tracking import MlflowClient

from entivec.schemas.spec import MODEL_NAME_PATTERN, Spec, SpecError, spec_from_dict
from entivec.schemas.vector_set import VectorSet
from entivec.settings import artifact_root, project_home, tracking_uri

STAGING = "staging"
PRODUCTION = "production"
ALIAS_PATTERN = re.compile(r"^[A-Za-z][A-Za-z0-9_-]{0,63}$")
VECTOR_SET_ARTIFACT = "vector_set"  # folder name inside the run and inside the registered model's artifacts
TAG_PREFIX = "entivec."


class RegistryError(LookupError):
    """A name, version or alias that does not exist or is not well formed; the message says which."""


def client() -> MlflowClient:
    """A client bound to the configured store (the embedded SQLite store unless ``MLFLOW_TRACKING_URI`` is set)."""
    uri = tracking_uri()
    if uri.startswith("sqlite:///"):
        Path(uri.removeprefix("sqlite:///")).parent.mkdir(parents=True, exist_ok=True)
    mlflow.set_tracking_uri(uri)
    mlflow.set_registry_uri(uri)
    return MlflowClient(tracking_uri=uri, registry_uri=uri)


@contextmanager
def ending_run(c: MlflowClient, run_id: str) -> Iterator[str]:
    """Close a run made with the client: FINISHED when the block completes, FAILED (then re-raised) when it raises.

    A run left RUNNING after a crash would read as still in progress in every listing of the experiment.
    """
    try:
        yield run_id
    except BaseException:
        c.set_terminated(run_id, status="FAILED")
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
    except MlflowException:  # created meanwhile by a concurrent run
        return c.get_experiment_by_name(experiment_name).experiment_id


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


def list_versions(name: str) -> list[ModelVersion]:
    """Every version of ``name``, newest first. An unknown name is an error that says so."""
    c = client()
    check_name(name)
    try:
        c.get_registered_model(name)
    except MlflowException:
        known = sorted(m.name for m in c.search_registered_models())
        hint = f"; registered: {', '.join(known)}" if known else "; nothing is registered yet"
        raise RegistryError(f"no registered model named {name!r}{hint}") from None
    versions = c.search_model_versions(f"name = '{name}'")
    return sorted(versions, key=lambda v: int(v.version), reverse=True)


def resolve(name: str, version_or_alias: str | int) -> ModelVersion:
    """A version given as a number (``3``, ``v3``) or an alias (``staging``, ``production``)."""
    c = client()
    check_name(name)
    text = str(version_or_alias).strip()
    number = text[1:] if text.lower().startswith("v") and text[1:].isdigit() else text
    if number.isdigit():
        try:
            return c.get_model_version(name, number)
        except MlflowException:
            versions = [str(v.version) for v in list_versions(name)]
            raise RegistryError(
                f"model {name!r} has no version {number}; versions: {', '.join(versions) or 'none'}"
            ) from None
    check_alias(text)
    try:
        return c.get_model_version_by_alias(name, text)
    except MlflowException:
        list_versions(name)  # an unknown model name gets its own message
        aliases = sorted(c.get_registered_model(name).aliases)
        raise RegistryError(
            f"model {name!r} has no alias {text!r}; aliases: {', '.join(aliases) or 'none'}"
        ) from None


def aliases_of(name: str) -> dict[str, str]:
    """Alias -> version number for ``name``."""
    return {alias: str(v) for alias, v in client().get_registered_model(name).aliases.items()}


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
    """The vector set of one registered version. Versions are immutable, so a local copy is cached."""
    mv = resolve(name, version_or_alias)
    version = str(mv.version)
    folder = _cache_folder(name, version)
    if not (folder / "vector_set.json").exists():
        project_home().mkdir(parents=True, exist_ok=True)
        with tempfile.TemporaryDirectory(dir=project_home()) as tmp:
            local = mlflow.artifacts.download_artifacts(
                artifact_uri=f"runs:/{mv.run_id}/{VECTOR_SET_ARTIFACT}", dst_path=tmp, tracking_uri=tracking_uri()
            )
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


def run_file(run_id: str, artifact: str) -> Path | None:
    """A file of a run's artifacts, downloaded once into the project's cache (run artifacts do not change)."""
    key = "".join(ch if ch.isalnum() else "_" for ch in tracking_uri())[-80:]
    target = project_home() / "cache" / key / "runs" / run_id
    local = target / artifact
    if local.exists():
        return local
    target.mkdir(parents=True, exist_ok=True)
    try:
        return Path(mlflow.artifacts.download_artifacts(
            run_id=run_id, artifact_path=artifact, dst_path=str(target), tracking_uri=tracking_uri()))
    except (MlflowException, OSError):
        return None


def version_spec(version: LoadedVersion) -> Spec | None:
    """The spec (as resolved) a version was trained with, from its run."""
    path = run_file(version.run_id, "spec.resolved.yaml")
    if path is None or not path.exists():
        return None
    try:
        return spec_from_dict(yaml.safe_load(path.read_text(encoding="utf-8")), str(path))
    except SpecError:
        return None  # written by an older spec model; treated as unknown
