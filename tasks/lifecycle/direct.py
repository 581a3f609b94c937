"""Reads of the embedded SQLite tracking store without importing MLflow: the fast path of the read-only commands.

``entivec versions``, ``runs``, ``history``, ``export``, ``diff`` and ``report`` only read the registry. Through
``MlflowClient`` each of them would first pay MLflow's import and its store's start-up (about 3 s on this
machine, most of the 3 s a read command may take). When the store is the embedded SQLite file, these commands
read its tables directly instead: ``sqlite3`` opened read-only, with the same filters MLflow applies (the default
workspace; deleted versions left out), returning objects that carry the attributes entivec reads from MLflow's
entities. Artifacts of a local (``file:``) artifact store are listed and copied from disk.

Anything this module does not know how to answer exactly (another store, an artifact store that is not local, a
filter other than the ones below, a schema without the expected columns, a locked or unreadable file) raises
:class:`NotDirect`, and the caller asks MLflow instead, so the fast path can be slower to be right but never
wrong. ``tests/test_direct_reads.py`` checks every answer against ``MlflowClient`` on the same store.

Writes always go through MLflow.
"""

from __future__ import annotations

import re
import shutil
import sqlite3
from dataclasses import dataclass, field
from pathlib import Path
from urllib.parse import unquote, urlsplit

DEFAULT_WORKSPACE = "default"  # MLflow's workspace when workspaces are not enabled
DELETED_STAGE = "Deleted_Internal"  # MLflow keeps a deleted version's row with this stage

# Tables and columns read here: a store without any of them is answered by MLflow.
COLUMNS = {
    "registered_models": {"name", "creation_time", "last_updated_time", "description", "workspace"},
    "registered_model_tags": {"key", "value", "name", "workspace"},
    "registered_model_aliases": {"alias", "version", "name", "workspace"},
    "model_versions": {"name", "version", "creation_time", "last_updated_time", "description", "user_id",
                       "current_stage", "source", "run_id", "status", "status_message", "run_link",
                       "storage_location", "workspace"},
    "model_version_tags": {"key", "value", "name", "version", "workspace"},
    "experiments": {"experiment_id", "name", "artifact_location", "lifecycle_stage", "creation_time",
                    "last_update_time", "workspace"},
    "runs": {"run_uuid", "name", "user_id", "status", "start_time", "end_time", "lifecycle_stage",
             "artifact_uri", "experiment_id"},
    "tags": {"key", "value", "run_uuid"},
    "params": {"key", "value", "run_uuid"},
    "latest_metrics": {"key", "value", "is_nan", "run_uuid"},
}
NAME_FILTER = re.compile(r"^\s*name\s*=\s*'((?:[^'\\]|\\.)*)'\s*$")
STATUS_FILTER = re.compile(r"^\s*attributes\.status\s*=\s*'([A-Z]+)'\s*$")
TAG_FILTER = re.compile(r"^\s*tags\.`([^`]+)`\s*=\s*'([^'\\]*)'\s*$")
AND = re.compile(r"\s+and\s+", re.IGNORECASE)
START_TIME_ORDERS = ({"attributes.start_time DESC"}, set())  # what search_runs answers here (MLflow's default)


class NotDirect(Exception):
    """This read cannot be answered from the file exactly: ask MLflow."""


class StoreAnswer(LookupError):
    """The store's answer "no such model, version, alias or run", as MLflow's RESOURCE_DOES_NOT_EXIST."""

    def __init__(self, message: str, error_code: str = "RESOURCE_DOES_NOT_EXIST") -> None:
        super().__init__(message)
        self.message = message
        self.error_code = error_code


@dataclass
class ModelVersionRow:
    name: str
    version: int
    creation_timestamp: int | None
    last_updated_timestamp: int | None
    description: str | None
    user_id: str | None
    current_stage: str | None
    source: str | None
    run_id: str | None
    status: str | None
    status_message: str | None
    run_link: str | None
    tags: dict[str, str] = field(default_factory=dict)
    aliases: list[str] = field(default_factory=list)


@dataclass
class RegisteredModelRow:
    name: str
    creation_timestamp: int | None
    last_updated_timestamp: int | None
    description: str | None
    tags: dict[str, str] = field(default_factory=dict)
    aliases: dict[str, int] = field(default_factory=dict)


@dataclass
class ExperimentRow:
    experiment_id: str
    name: str
    artifact_location: str | None
    lifecycle_stage: str | None


@dataclass
class RunInfoRow:
    run_id: str
    run_name: str | None
    experiment_id: str
    user_id: str | None
    status: str | None
    start_time: int | None
    end_time: int | None
    lifecycle_stage: str | None
    artifact_uri: str | None

    @property
    def run_uuid(self) -> str:
        return self.run_id


@dataclass
class RunDataRow:
    metrics: dict[str, float]
    params: dict[str, str]
    tags: dict[str, str]


@dataclass
class RunRow:
    info: RunInfoRow
    data: RunDataRow


@dataclass
class FileRow:
    path: str
    is_dir: bool
    file_size: int | None


def sqlite_path(uri: str) -> Path | None:
    """The file of a ``sqlite:///`` tracking URI, or None for any other store."""
    if not uri.startswith("sqlite:///"):
        return None
    return Path(uri.removeprefix("sqlite:///").split("?", 1)[0])


def local_path(uri: str | None) -> Path | None:
    """The folder of a ``file:`` (or plain path) artifact location, or None for a remote one."""
    if not uri:
        return None
    parts = urlsplit(uri)
    if parts.scheme == "file":
        return Path(unquote(parts.path))
    if parts.scheme == "" and uri.startswith("/"):
        return Path(uri)
    return None


class DirectReader:
    """Read-only answers from one SQLite tracking file, in the shapes ``MlflowClient`` returns them."""

    METHODS = frozenset({
        "get_registered_model", "search_registered_models", "get_model_version", "get_model_version_by_alias",
        "search_model_versions", "get_experiment_by_name", "get_run", "search_runs", "list_artifacts",
        "log_artifact",
    })

    def __init__(self, path: Path) -> None:
        if not path.is_file():
            raise NotDirect(f"{path} does not exist yet")
        try:
            self._db = sqlite3.connect(f"file:{path}?mode=ro", uri=True, timeout=5.0, check_same_thread=False)
            for table, wanted in COLUMNS.items():
                present = {row[1] for row in self._db.execute(f'PRAGMA table_info("{table}")')}
                if not wanted <= present:
                    raise NotDirect(f"table {table} lacks {sorted(wanted - present)}")
        except sqlite3.Error as exc:
            raise NotDirect(str(exc)) from exc

    def close(self) -> None:
        self._db.close()

    def _rows(self, sql: str, *args) -> list[tuple]:
        try:
            return self._db.execute(sql, args).fetchall()
        except sqlite3.Error as exc:  # locked, corrupt, changed under us: MLflow says what it is
            raise NotDirect(str(exc)) from exc

    # --- registered models ------------------------------------------------------------------------------------

    def _model(self, row: tuple) -> RegisteredModelRow:
        name = row[0]
        tags = dict(self._rows("SELECT key, value FROM registered_model_tags WHERE workspace = ? AND name = ?",
                               DEFAULT_WORKSPACE, name))
        aliases = dict(self._rows("SELECT alias, version FROM registered_model_aliases WHERE workspace = ? AND "
                                  "name = ?", DEFAULT_WORKSPACE, name))
        return RegisteredModelRow(name, row[1], row[2], row[3], tags, aliases)

    def get_registered_model(self, name: str) -> RegisteredModelRow:
        rows = self._rows("SELECT name, creation_time, last_updated_time, description FROM registered_models "
                          "WHERE workspace = ? AND name = ?", DEFAULT_WORKSPACE, name)
        if not rows:
            raise StoreAnswer(f"Registered Model with name={name} not found")
        return self._model(rows[0])

    def search_registered_models(self, *args, **kwargs) -> list[RegisteredModelRow]:
        if args or kwargs.get("filter_string"):
            raise NotDirect("filtered model search")
        rows = self._rows("SELECT name, creation_time, last_updated_time, description FROM registered_models "
                          "WHERE workspace = ? ORDER BY name", DEFAULT_WORKSPACE)
        return [self._model(row) for row in rows]

    # --- versions ---------------------------------------------------------------------------------------------

    _VERSION_COLUMNS = ("name, version, creation_time, last_updated_time, description, user_id, current_stage, "
                        "source, run_id, status, status_message, run_link")

    def _versions(self, where: str, *args, aliases: bool = True) -> list[ModelVersionRow]:
        rows = self._rows(f"SELECT {self._VERSION_COLUMNS} FROM model_versions WHERE workspace = ? AND "
                          f"(current_stage IS NULL OR current_stage != ?) AND {where}",
                          DEFAULT_WORKSPACE, DELETED_STAGE, *args)
        found = []
        for row in rows:
            name, version = row[0], int(row[1])
            tags = dict(self._rows("SELECT key, value FROM model_version_tags WHERE workspace = ? AND name = ? "
                                   "AND version = ?", DEFAULT_WORKSPACE, name, version))
            held = [a for (a,) in self._rows("SELECT alias FROM registered_model_aliases WHERE workspace = ? "
                                             "AND name = ? AND version = ?", DEFAULT_WORKSPACE, name, version)]
            found.append(ModelVersionRow(name, version, *row[2:], tags=tags, aliases=held if aliases else []))
        return found

    def get_model_version(self, name: str, version: str | int) -> ModelVersionRow:
        text = str(version).strip()
        if not text.isdigit():
            raise StoreAnswer(f"Parameter 'version' must be an integer, got '{version}'.", "INVALID_PARAMETER_VALUE")
        found = self._versions("name = ? AND version = ?", name, int(text))
        if not found:
            raise StoreAnswer(f"Model Version (name={name}, version={version}) not found")
        return found[0]

    def get_model_version_by_alias(self, name: str, alias: str) -> ModelVersionRow:
        rows = self._rows("SELECT version FROM registered_model_aliases WHERE workspace = ? AND name = ? AND "
                          "alias = ?", DEFAULT_WORKSPACE, name, alias)
        if not rows:
            raise StoreAnswer(f"Registered model alias {alias} not found.", "INVALID_PARAMETER_VALUE")
        return self.get_model_version(name, rows[0][0])

    def search_model_versions(self, filter_string: str | None = None, *args, **kwargs) -> list[ModelVersionRow]:
        match = NAME_FILTER.match(filter_string or "")
        if match is None or args or kwargs.get("order_by") or "max_results" in kwargs:
            raise NotDirect(f"model version search {filter_string!r}")
        name = re.sub(r"\\(.)", r"\1", match.group(1))
        return self._versions("name = ?", name, aliases=False)  # MLflow's search leaves a version's aliases empty

    # --- experiments and runs ---------------------------------------------------------------------------------

    def get_experiment_by_name(self, name: str) -> ExperimentRow | None:
        rows = self._rows("SELECT experiment_id, name, artifact_location, lifecycle_stage FROM experiments "
                          "WHERE workspace = ? AND name = ?", DEFAULT_WORKSPACE, name)
        return None if not rows else ExperimentRow(str(rows[0][0]), *rows[0][1:])

    _RUN_COLUMNS = "run_uuid, name, experiment_id, user_id, status, start_time, end_time, lifecycle_stage, artifact_uri"

    def _run(self, row: tuple) -> RunRow:
        run_id = row[0]
        info = RunInfoRow(run_id, row[1], str(row[2]), *row[3:])
        metrics = {key: (float("nan") if is_nan else float(value)) for key, value, is_nan in
                   self._rows("SELECT key, value, is_nan FROM latest_metrics WHERE run_uuid = ?", run_id)}
        params = dict(self._rows("SELECT key, value FROM params WHERE run_uuid = ?", run_id))
        tags = dict(self._rows("SELECT key, value FROM tags WHERE run_uuid = ?", run_id))
        return RunRow(info, RunDataRow(metrics, params, tags))

    def get_run(self, run_id: str) -> RunRow:
        rows = self._rows(f"SELECT {self._RUN_COLUMNS} FROM runs WHERE run_uuid = ?", run_id)
        if not rows:
            raise StoreAnswer(f"Run with id={run_id} not found")
        return self._run(rows[0])

    def search_runs(self, experiment_ids, filter_string: str = "", run_view_type=None, max_results: int = 1000,
                    order_by=None, page_token=None) -> list[RunRow]:
        if run_view_type not in (None, 1) or page_token is not None or set(order_by or ()) not in START_TIME_ORDERS:
            raise NotDirect("a run search this reader does not answer")
        ids = [int(e) for e in ([experiment_ids] if isinstance(experiment_ids, str | int) else experiment_ids)]
        if not ids:
            return []
        where, args = [f"experiment_id IN ({', '.join('?' * len(ids))})", "lifecycle_stage = 'active'"], list(ids)
        # The filters entivec writes: a status, and tags equal to a value, joined by "and"; others go to MLflow.
        for clause in AND.split(filter_string.strip()) if filter_string.strip() else ():
            status, tag = STATUS_FILTER.match(clause), TAG_FILTER.match(clause)
            if status is not None:
                where.append("status = ?")
                args.append(status.group(1))
            elif tag is not None:
                where.append("run_uuid IN (SELECT run_uuid FROM tags WHERE key = ? AND value = ?)")
                args.extend(tag.groups())
            else:
                raise NotDirect(f"run filter {filter_string!r}")
        # MLflow's order: newest start first, then run id (its tie-break); NULL start times last.
        rows = self._rows(f"SELECT {self._RUN_COLUMNS} FROM runs WHERE {' AND '.join(where)} "
                          "ORDER BY start_time IS NULL, start_time DESC, run_uuid LIMIT ?", *args, int(max_results))
        return [self._run(row) for row in rows]

    # --- artifacts --------------------------------------------------------------------------------------------

    def run_artifact_folder(self, run_id: str) -> Path:
        root = local_path(self.get_run(run_id).info.artifact_uri)
        if root is None:
            raise NotDirect("the artifact store is not a local folder")
        return root

    def list_artifacts(self, run_id: str, path: str | None = None) -> list[FileRow]:
        root = self.run_artifact_folder(run_id)
        folder = root / path if path else root
        if not folder.is_dir():
            return []
        found = []
        for item in sorted(folder.iterdir()):
            relative = item.relative_to(root).as_posix()
            found.append(FileRow(relative, True, None) if item.is_dir() else
                         FileRow(relative, False, item.stat().st_size))
        return found

    def log_artifact(self, run_id: str, local_file: str, artifact_path: str | None = None) -> None:
        """Copy one file into a run's local artifact folder, as MLflow's local artifact store does (the tracking
        database is not written)."""
        folder = self.run_artifact_folder(run_id)
        target = folder / artifact_path if artifact_path else folder
        target.mkdir(parents=True, exist_ok=True)
        shutil.copy2(local_file, target / Path(local_file).name)

    def download(self, run_id: str, artifact_path: str, dst_path: str) -> str:
        """Copy one artifact (file or folder) of a local store into ``dst_path``, as MLflow's download does."""
        source = self.run_artifact_folder(run_id) / artifact_path
        if not source.exists():
            raise NotDirect(f"artifact {artifact_path} of run {run_id} is not on disk")
        target = Path(dst_path) / artifact_path
        target.parent.mkdir(parents=True, exist_ok=True)
        if source.is_dir():
            shutil.copytree(source, target, dirs_exist_ok=True)
        else:
            shutil.copy2(source, target)
        return str(target)
