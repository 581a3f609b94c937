"""Starts, stops and checks the team stack on one machine: PostgreSQL, MLflow server, Prefect server and a worker.

Run it through ``infra/stack`` (which picks the project's Python): ``up [SERVICE...]``, ``down [SERVICE...]``,
``status [--json]``, ``env``. Settings come from ``infra/stack.env`` (or ``ENTIVEC_STACK_ENV``); a variable
set in the environment wins. Every server runs in its own process group with a pid file, so ``down`` stops
whatever is running even after a start that failed half-way.
"""

from __future__ import annotations

import argparse
import difflib
import json
import os
import secrets
import shlex
import shutil
import signal
import subprocess
import sys
import time
import urllib.error
import urllib.request
from dataclasses import dataclass
from pathlib import Path

REPO = Path(__file__).resolve().parent.parent
SERVICES = ("postgres", "mlflow", "prefect", "worker")  # start order; stop order is the reverse
KEYS = (
    "ENTIVEC_STACK_DIR", "ENTIVEC_STACK_HOST", "ENTIVEC_PG_PORT", "ENTIVEC_MLFLOW_PORT", "ENTIVEC_PREFECT_PORT",
    "ENTIVEC_PG_DATA", "ENTIVEC_PG_BIN", "ENTIVEC_PG_OS_USER", "ENTIVEC_PG_ROLE", "ENTIVEC_PG_MLFLOW_DB",
    "ENTIVEC_PG_PREFECT_DB", "ENTIVEC_ARTIFACTS_DIR", "ENTIVEC_MLFLOW_WORKERS", "ENTIVEC_WORK_POOL",
    "ENTIVEC_STACK_TIMEOUT",
)
QUIET = {
    "PREFECT_SERVER_ANALYTICS_ENABLED": "false",
    "MLFLOW_DISABLE_TELEMETRY": "true",
    "DO_NOT_TRACK": "true",
    "GIT_PYTHON_REFRESH": "quiet",
}


class StackError(RuntimeError):
    """Something the operator can fix: a bad setting, a missing binary, a folder postgres cannot reach."""


# --- settings ---------------------------------------------------------------------------------------------------


def read_env_file(path: Path) -> dict[str, str]:
    """KEY=VALUE lines; blank lines and lines starting with # are skipped; unknown keys are errors."""
    values: dict[str, str] = {}
    for number, raw in enumerate(path.read_text(encoding="utf-8").splitlines(), start=1):
        line = raw.strip()
        if not line or line.startswith("#"):
            continue
        key, sep, value = line.partition("=")
        key = key.strip().removeprefix("export ").strip()
        if not sep or key not in KEYS:
            close = difflib.get_close_matches(key, KEYS, n=1)
            hint = f" (did you mean {close[0]}?)" if close else ""
            raise StackError(f"{path}, line {number}: {key!r} is not a stack setting{hint}")
        values[key] = value.strip().strip("'\"")
    return values


@dataclass
class Config:
    stack_dir: Path
    host: str
    pg_port: int
    mlflow_port: int
    prefect_port: int
    pg_data: Path
    pg_bin: str
    pg_os_user: str
    pg_role: str
    mlflow_db: str
    prefect_db: str
    artifacts_dir: Path
    mlflow_workers: int
    work_pool: str
    timeout: float

    @classmethod
    def load(cls) -> Config:
        env_file = Path(os.environ.get("ENTIVEC_STACK_ENV") or REPO / "infra" / "stack.env")
        values = read_env_file(env_file) if env_file.exists() else {}
        values.update({k: os.environ[k] for k in KEYS if os.environ.get(k)})

        def path(key: str, default: Path) -> Path:
            text = values.get(key, "")
            chosen = Path(text).expanduser() if text else default
            return chosen if chosen.is_absolute() else (REPO / chosen)

        def number(key: str, default: int) -> int:
            try:
                return int(values.get(key) or default)
            except ValueError:
                raise StackError(f"{key}={values[key]!r}: expected a whole number") from None

        stack_dir = path("ENTIVEC_STACK_DIR", REPO / ".entivec" / "stack").resolve()
        return cls(
            stack_dir=stack_dir,
            host=values.get("ENTIVEC_STACK_HOST") or "127.0.0.1",
            pg_port=number("ENTIVEC_PG_PORT", 5433),
            mlflow_port=number("ENTIVEC_MLFLOW_PORT", 5000),
            prefect_port=number("ENTIVEC_PREFECT_PORT", 4200),
            pg_data=path("ENTIVEC_PG_DATA", stack_dir / "postgres" / "data").resolve(),
            pg_bin=values.get("ENTIVEC_PG_BIN", ""),
            pg_os_user=values.get("ENTIVEC_PG_OS_USER") or "postgres",
            pg_role=values.get("ENTIVEC_PG_ROLE") or "entivec",
            mlflow_db=values.get("ENTIVEC_PG_MLFLOW_DB") or "mlflow",
            prefect_db=values.get("ENTIVEC_PG_PREFECT_DB") or "prefect",
            artifacts_dir=path("ENTIVEC_ARTIFACTS_DIR", stack_dir / "artifacts").resolve(),
            mlflow_workers=number("ENTIVEC_MLFLOW_WORKERS", 2),
            work_pool=values.get("ENTIVEC_WORK_POOL") or "entivec-process",
            timeout=float(number("ENTIVEC_STACK_TIMEOUT", 240)),
        )

    # Where clients reach the servers: a wildcard bind address is reached on loopback.
    @property
    def client_host(self) -> str:
        return {"0.0.0.0": "127.0.0.1", "::": "::1", "": "127.0.0.1"}.get(self.host, self.host)

    @property
    def mlflow_url(self) -> str:
        return f"http://{self.client_host}:{self.mlflow_port}"

    @property
    def prefect_api_url(self) -> str:
        return f"http://{self.client_host}:{self.prefect_port}/api"

    @property
    def pg_home(self) -> Path:
        """Folder owned by the PostgreSQL user: its log, and the cluster unless ENTIVEC_PG_DATA says otherwise."""
        return self.stack_dir / "postgres"

    @property
    def pgpass(self) -> Path:
        return self.stack_dir / "secrets" / "pgpass"

    def database_uri(self, driver: str, database: str) -> str:
        # No password in the URI: libpq (psycopg2) and asyncpg both read it from PGPASSFILE, so it never shows
        # in a process list or a log line.
        return f"postgresql+{driver}://{self.pg_role}@{self.client_host}:{self.pg_port}/{database}"

    def pid_file(self, service: str) -> Path:
        return self.stack_dir / "run" / f"{service}.pid"

    def log_file(self, service: str) -> Path:
        if service == "postgres":
            return self.pg_home / "postgres.log"
        return self.stack_dir / "logs" / f"{service}.log"


# --- processes --------------------------------------------------------------------------------------------------


def _proc_stat(pid: int) -> tuple[str, int, str] | None:
    """(state, process group, start time) of a live process; None when it is gone or a zombie."""
    try:
        text = Path(f"/proc/{pid}/stat").read_text()
    except OSError:
        return None
    fields = text[text.rindex(")") + 2:].split()
    state, pgid, started = fields[0], int(fields[2]), fields[19]
    return None if state in ("Z", "X") else (state, pgid, started)


def _write_pid(path: Path, pid: int) -> None:
    stat = _proc_stat(pid)
    path.parent.mkdir(parents=True, exist_ok=True)
    # The start time guards against a recycled pid: `down` never signals a process that is not ours.
    path.write_text(f"{pid} {stat[2] if stat else 0}\n")


def _read_pid(path: Path) -> int | None:
    """The pid in a pid file when that very process is still alive."""
    try:
        pid_text, started = path.read_text().split()
        pid = int(pid_text)
    except (OSError, ValueError):
        return None
    stat = _proc_stat(pid)
    return pid if stat and (started == "0" or stat[2] == started) else None


def _group_alive(pgid: int) -> bool:
    for entry in Path("/proc").iterdir():
        if entry.name.isdigit():
            stat = _proc_stat(int(entry.name))
            if stat and stat[1] == pgid:
                return True
    return False


def _stop_group(pid: int, grace: float = 20.0) -> None:
    """SIGTERM the process group a server leads, then SIGKILL whatever is left after ``grace`` seconds."""
    for sig in (signal.SIGTERM, signal.SIGKILL):
        try:
            os.killpg(pid, sig)
        except ProcessLookupError:  # not a group leader after all: signal the process itself
            try:
                os.kill(pid, sig)
            except ProcessLookupError:
                return
        deadline = time.monotonic() + (grace if sig == signal.SIGTERM else 5.0)
        while time.monotonic() < deadline:
            if not _group_alive(pid) and _proc_stat(pid) is None:
                return
            time.sleep(0.2)


def _spawn(cfg: Config, service: str, argv: list[str], env: dict[str, str]) -> int:
    log = cfg.log_file(service)
    log.parent.mkdir(parents=True, exist_ok=True)
    with open(log, "ab") as out:
        out.write(f"\n--- {time.strftime('%Y-%m-%d %H:%M:%S')} starting: {shlex.join(argv)}\n".encode())
        out.flush()
        # Its own session: the server outlives this command, and `down` stops it with all its children.
        process = subprocess.Popen(argv, stdin=subprocess.DEVNULL, stdout=out, stderr=subprocess.STDOUT,
                                   env=env, cwd=cfg.stack_dir, start_new_session=True)
    _write_pid(cfg.pid_file(service), process.pid)
    return process.pid


def _tail(path: Path, lines: int = 25) -> str:
    try:
        return "\n".join(path.read_text(errors="replace").splitlines()[-lines:])
    except OSError:
        return "(no log)"


def _wait(cfg: Config, service: str, healthy, pid: int | None) -> None:
    deadline = time.monotonic() + cfg.timeout
    while time.monotonic() < deadline:
        ok, _ = healthy(cfg)
        if ok:
            return
        if pid is not None and _read_pid(cfg.pid_file(service)) is None:
            raise StackError(f"{service} exited during start-up; last lines of {cfg.log_file(service)}:\n"
                             + _tail(cfg.log_file(service)))
        time.sleep(0.5)
    raise StackError(f"{service} did not become healthy within {cfg.timeout:.0f} s (ENTIVEC_STACK_TIMEOUT); "
                     f"last lines of {cfg.log_file(service)}:\n" + _tail(cfg.log_file(service)))


def _claim_port(cfg: Config, service: str, port: int) -> None:
    """Refuse to start when another program listens on the port: its health answer would pass for ours."""
    import socket

    with socket.socket(socket.AF_INET6 if ":" in cfg.client_host else socket.AF_INET) as probe:
        probe.settimeout(2)
        if probe.connect_ex((cfg.client_host, port)) == 0:
            setting = {"postgres": "ENTIVEC_PG_PORT", "mlflow": "ENTIVEC_MLFLOW_PORT"}.get(service,
                                                                                      "ENTIVEC_PREFECT_PORT")
            raise StackError(f"{service}: port {port} on {cfg.client_host} is in use by another program; "
                             f"stop it or choose another port ({setting})")


def _python_tool(name: str) -> str:
    """The mlflow/prefect executables of the Python running this script (the project's venv)."""
    beside = Path(sys.executable).parent / name
    found = str(beside) if beside.exists() else shutil.which(name)
    if not found:
        raise StackError(f"{name} not found beside {sys.executable} or on PATH: install entivec first (make test)")
    return found


def _base_env(cfg: Config) -> dict[str, str]:
    env = dict(os.environ)
    env.update(QUIET)
    env["PGPASSFILE"] = str(cfg.pgpass)
    return env


# --- PostgreSQL -------------------------------------------------------------------------------------------------


def pg_bin(cfg: Config) -> Path:
    """The folder with initdb, pg_ctl and pg_isready: ENTIVEC_PG_BIN, PATH, or Debian's versioned folder."""
    if cfg.pg_bin:
        folder = Path(cfg.pg_bin)
        if not (folder / "initdb").exists():
            raise StackError(f"ENTIVEC_PG_BIN={cfg.pg_bin}: no initdb there")
        return folder
    on_path = shutil.which("initdb")
    if on_path:
        return Path(on_path).resolve().parent
    versions = sorted(Path("/usr/lib/postgresql").glob("*/bin/initdb"), key=lambda p: int(p.parent.parent.name)
                      if p.parent.parent.name.isdigit() else 0)
    if versions:
        return versions[-1].parent
    raise StackError("PostgreSQL server binaries not found (initdb, pg_ctl): install them "
                     "(Debian: apt-get install -y postgresql) or set ENTIVEC_PG_BIN")


def _as_pg_user(cfg: Config, argv: list[str]) -> list[str]:
    if os.geteuid() != 0:
        return argv
    return ["runuser", "-u", cfg.pg_os_user, "--", *argv]


def _run(argv: list[str], what: str, env: dict[str, str] | None = None) -> subprocess.CompletedProcess:
    done = subprocess.run(argv, capture_output=True, text=True, env=env)
    if done.returncode != 0:
        raise StackError(f"{what} failed ({shlex.join(argv)}):\n{done.stdout}{done.stderr}")
    return done


def _pg_folders(cfg: Config) -> None:
    """Create the folders postgres writes to and hand them to its user; check it can reach them."""
    for folder in (cfg.pg_home, cfg.pg_data):
        folder.mkdir(parents=True, exist_ok=True)
        folder.chmod(0o700)
        if os.geteuid() == 0:
            shutil.chown(folder, user=cfg.pg_os_user, group=None)
    if os.geteuid() == 0:
        probe = subprocess.run(_as_pg_user(cfg, ["test", "-w", str(cfg.pg_data), "-a", "-w", str(cfg.pg_home)]))
        if probe.returncode != 0:
            raise StackError(
                f"user {cfg.pg_os_user!r} cannot reach {cfg.pg_data}: a parent folder is closed to it. "
                "Allow it to pass (chmod o+x on the parents) or choose ENTIVEC_STACK_DIR / ENTIVEC_PG_DATA elsewhere"
            )


def _password(cfg: Config) -> str:
    """The role's password, made once and kept in a pgpass file readable by the stack's user only."""
    cfg.pgpass.parent.mkdir(parents=True, exist_ok=True)
    cfg.pgpass.parent.chmod(0o700)
    if cfg.pgpass.exists():
        return cfg.pgpass.read_text().strip().rsplit(":", 1)[1]
    password = secrets.token_urlsafe(24)
    cfg.pgpass.touch(mode=0o600)
    cfg.pgpass.write_text(f"*:{cfg.pg_port}:*:{cfg.pg_role}:{password}\n")
    return password


def _pg_running(cfg: Config) -> int | None:
    pid_file = cfg.pg_data / "postmaster.pid"
    try:
        pid = int(pid_file.read_text().split()[0])
    except (OSError, ValueError, IndexError):
        return None
    return pid if _proc_stat(pid) else None


def start_postgres(cfg: Config) -> None:
    binaries = pg_bin(cfg)
    _pg_folders(cfg)
    password = _password(cfg)
    # The pgpass line carries the port: rewrite it when the configured port changed since the first start.
    cfg.pgpass.write_text(f"*:{cfg.pg_port}:*:{cfg.pg_role}:{password}\n")
    if not (cfg.pg_data / "PG_VERSION").exists():
        secret = cfg.pg_home / ".initdb-password"
        secret.write_text(password + "\n")
        secret.chmod(0o600)
        if os.geteuid() == 0:
            shutil.chown(secret, user=cfg.pg_os_user, group=None)
        try:
            # scram-sha-256 everywhere: no trust, no peer; the only way in is the role's password.
            _run(_as_pg_user(cfg, [str(binaries / "initdb"), "-D", str(cfg.pg_data), "-U", cfg.pg_role,
                                   f"--pwfile={secret}", "--auth-host=scram-sha-256", "--auth-local=scram-sha-256",
                                   "-E", "UTF8", "--no-locale"]), "initdb")
        finally:
            secret.unlink(missing_ok=True)
    if _pg_running(cfg) is None:
        _claim_port(cfg, "postgres", cfg.pg_port)
        options = (f"-p {cfg.pg_port} -c listen_addresses={cfg.host} -c unix_socket_directories=''")
        _run(_as_pg_user(cfg, [str(binaries / "pg_ctl"), "-D", str(cfg.pg_data), "-l", str(cfg.log_file("postgres")),
                               "-o", options, "-w", "-t", str(int(cfg.timeout)), "start"]), "starting PostgreSQL")
    pid = _pg_running(cfg)
    if pid:
        _write_pid(cfg.pid_file("postgres"), pid)
    _wait(cfg, "postgres", check_postgres, None)
    _create_databases(cfg)


def _create_databases(cfg: Config) -> None:
    import psycopg2  # the project's dependency; imported here so `status` and `down` work without it

    connection = psycopg2.connect(host=cfg.client_host, port=cfg.pg_port, user=cfg.pg_role, dbname="postgres",
                                  passfile=str(cfg.pgpass), connect_timeout=10)
    try:
        connection.autocommit = True
        with connection.cursor() as cursor:
            for database in (cfg.mlflow_db, cfg.prefect_db):
                cursor.execute("SELECT 1 FROM pg_database WHERE datname = %s", (database,))
                if cursor.fetchone() is None:
                    cursor.execute(f'CREATE DATABASE "{database}"')
    finally:
        connection.close()


def stop_postgres(cfg: Config) -> None:
    if _pg_running(cfg) is not None:
        try:
            binaries = pg_bin(cfg)
            subprocess.run(_as_pg_user(cfg, [str(binaries / "pg_ctl"), "-D", str(cfg.pg_data), "-m", "fast", "-w",
                                             "-t", "60", "stop"]), capture_output=True)
        except StackError:
            pass
    pid = _pg_running(cfg) or _read_pid(cfg.pid_file("postgres"))
    if pid is not None:  # pg_ctl could not stop it (or is gone): end the postmaster and its children
        _stop_group(pid)
    cfg.pid_file("postgres").unlink(missing_ok=True)


def check_postgres(cfg: Config) -> tuple[bool, str]:
    try:
        tool = pg_bin(cfg) / "pg_isready"
    except StackError as exc:
        return False, str(exc)
    if not tool.exists():
        tool = Path(shutil.which("pg_isready") or "pg_isready")
    done = subprocess.run([str(tool), "-h", cfg.client_host, "-p", str(cfg.pg_port), "-t", "3"],
                          capture_output=True, text=True)
    return done.returncode == 0, (done.stdout or done.stderr).strip()


# --- MLflow, Prefect, worker ------------------------------------------------------------------------------------


def _http(url: str, body: dict | None = None, timeout: float = 5.0) -> tuple[int, str]:
    data = json.dumps(body).encode() if body is not None else None
    request = urllib.request.Request(url, data=data, headers={"Content-Type": "application/json"} if data else {})
    try:
        with urllib.request.urlopen(request, timeout=timeout) as response:
            return response.status, response.read().decode(errors="replace")
    except urllib.error.HTTPError as exc:
        return exc.code, exc.read().decode(errors="replace")
    except (OSError, urllib.error.URLError) as exc:
        return 0, str(getattr(exc, "reason", exc))


def start_mlflow(cfg: Config) -> None:
    if _read_pid(cfg.pid_file("mlflow")) is not None:
        return
    _claim_port(cfg, "mlflow", cfg.mlflow_port)
    cfg.artifacts_dir.mkdir(parents=True, exist_ok=True)
    # --serve-artifacts with --artifacts-destination: clients upload and download through this server
    # (mlflow-artifacts:/ URIs), so no client needs the artifact folder mounted, and moving the artifacts to
    # object storage later changes only this flag.
    argv = [_python_tool("mlflow"), "server",
            "--backend-store-uri", cfg.database_uri("psycopg2", cfg.mlflow_db),
            "--serve-artifacts", "--artifacts-destination", str(cfg.artifacts_dir),
            "--host", cfg.host, "--port", str(cfg.mlflow_port), "--workers", str(cfg.mlflow_workers)]
    pid = _spawn(cfg, "mlflow", argv, _base_env(cfg))
    _wait(cfg, "mlflow", check_mlflow, pid)


def check_mlflow(cfg: Config) -> tuple[bool, str]:
    status, body = _http(f"{cfg.mlflow_url}/health")
    return status == 200 and body.strip() == "OK", f"{cfg.mlflow_url}/health: {status or body}"


def _prefect_env(cfg: Config) -> dict[str, str]:
    env = _base_env(cfg)
    env.update({
        "PREFECT_HOME": str(cfg.stack_dir / "prefect"),
        "PREFECT_API_URL": cfg.prefect_api_url,
        # Prefect's own state lives in the same PostgreSQL as MLflow's: one server to back up and watch, and
        # no SQLite write lock between the scheduler, the API and several workers.
        "PREFECT_SERVER_DATABASE_CONNECTION_URL": cfg.database_uri("asyncpg", cfg.prefect_db),
    })
    return env


def start_prefect(cfg: Config) -> None:
    if _read_pid(cfg.pid_file("prefect")) is not None:
        return
    _claim_port(cfg, "prefect", cfg.prefect_port)
    argv = [_python_tool("prefect"), "server", "start", "--host", cfg.host, "--port", str(cfg.prefect_port)]
    pid = _spawn(cfg, "prefect", argv, _prefect_env(cfg))
    _wait(cfg, "prefect", check_prefect, pid)


def check_prefect(cfg: Config) -> tuple[bool, str]:
    status, body = _http(f"{cfg.prefect_api_url}/health")
    return status == 200 and body.strip() == "true", f"{cfg.prefect_api_url}/health: {status or body}"


def worker_name(cfg: Config) -> str:
    return f"entivec-worker-{cfg.prefect_port}"


def worker_env(cfg: Config) -> dict[str, str]:
    """What a flow run started by the worker sees: the stack's servers, and a project folder for scratch files."""
    env = _prefect_env(cfg)
    env.pop("PREFECT_SERVER_DATABASE_CONNECTION_URL")
    env["MLFLOW_TRACKING_URI"] = cfg.mlflow_url
    env.pop("MLFLOW_REGISTRY_URI", None)
    env.setdefault("ENTIVEC_HOME", str(cfg.stack_dir / "worker-home"))
    env["PREFECT_LOGGING_LEVEL"] = "INFO"  # the worker's log is where an operator looks first
    return env


def start_worker(cfg: Config) -> None:
    if _read_pid(cfg.pid_file("worker")) is not None:
        return
    # The worker creates the process work pool when it is missing; an existing pool keeps its settings.
    argv = [_python_tool("prefect"), "worker", "start", "--pool", cfg.work_pool, "--type", "process",
            "--name", worker_name(cfg)]
    pid = _spawn(cfg, "worker", argv, worker_env(cfg))
    _wait(cfg, "worker", check_worker, pid)


def check_worker(cfg: Config) -> tuple[bool, str]:
    if _read_pid(cfg.pid_file("worker")) is None:
        return False, "no worker process"
    status, body = _http(f"{cfg.prefect_api_url}/work_pools/{cfg.work_pool}/workers/filter", body={})
    if status != 200:
        return False, f"work pool {cfg.work_pool!r}: {status or body}"
    workers = {w.get("name"): w.get("status") for w in json.loads(body)}
    state = workers.get(worker_name(cfg))
    return state == "ONLINE", f"{worker_name(cfg)} in pool {cfg.work_pool!r}: {state or 'not registered yet'}"


STARTERS = {"postgres": start_postgres, "mlflow": start_mlflow, "prefect": start_prefect, "worker": start_worker}
CHECKS = {"postgres": check_postgres, "mlflow": check_mlflow, "prefect": check_prefect, "worker": check_worker}


def stop(cfg: Config, service: str) -> None:
    if service == "postgres":
        stop_postgres(cfg)
        return
    pid = _read_pid(cfg.pid_file(service))
    if pid is not None:
        _stop_group(pid)
    cfg.pid_file(service).unlink(missing_ok=True)


# --- commands ---------------------------------------------------------------------------------------------------


def client_settings(cfg: Config) -> dict[str, str]:
    return {"MLFLOW_TRACKING_URI": cfg.mlflow_url, "PREFECT_API_URL": cfg.prefect_api_url}


def command_up(cfg: Config, services: list[str]) -> int:
    for folder in (cfg.stack_dir, cfg.stack_dir / "run", cfg.stack_dir / "logs"):
        folder.mkdir(parents=True, exist_ok=True)
    for service in SERVICES:
        if service in services:
            print(f"starting {service} ...", flush=True)
            STARTERS[service](cfg)  # each leaves a server of ours that is running alone
    settings = cfg.stack_dir / "client.env"
    settings.write_text("".join(f"{k}={v}\n" for k, v in client_settings(cfg).items()))
    print(f"stack up: MLflow {cfg.mlflow_url}, Prefect {cfg.prefect_api_url}, work pool {cfg.work_pool}\n"
          f"clients: export ENTIVEC_SETTINGS={settings}  (or: eval \"$(infra/stack env)\")")
    return 0


def command_down(cfg: Config, services: list[str]) -> int:
    for service in reversed(SERVICES):
        if service in services:
            print(f"stopping {service} ...", flush=True)
            stop(cfg, service)
    return 0


def command_status(cfg: Config, as_json: bool) -> int:
    report = []
    for service in SERVICES:
        ok, detail = CHECKS[service](cfg)
        report.append({"service": service, "up": ok, "detail": detail, "log": str(cfg.log_file(service))})
    if as_json:
        print(json.dumps(report, indent=2))
    else:
        for row in report:
            print(f"{row['service']:<9} {'up' if row['up'] else 'DOWN':<5} {row['detail']}")
    return 0 if all(row["up"] for row in report) else 1


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="infra/stack", description=__doc__.splitlines()[0])
    sub = parser.add_subparsers(dest="command", required=True)
    for name, text in (("up", "start the servers (all, or those named) and wait until each is healthy"),
                       ("down", "stop the servers (all, or those named), also after a partial start")):
        command = sub.add_parser(name, help=text)
        command.add_argument("services", nargs="*", metavar="SERVICE",
                             help=f"any of {', '.join(SERVICES)} (default: all)")
    status = sub.add_parser("status", help="health of every server; exit code 1 when any is down")
    status.add_argument("--json", action="store_true", help="machine-readable output")
    sub.add_parser("env", help="print export lines for MLFLOW_TRACKING_URI and PREFECT_API_URL")
    args = parser.parse_args(argv)
    unknown = [s for s in getattr(args, "services", []) if s not in SERVICES]
    if unknown:
        parser.error(f"unknown service {', '.join(unknown)}: choose from {', '.join(SERVICES)}")
    try:
        cfg = Config.load()
        if args.command == "up":
            return command_up(cfg, args.services or list(SERVICES))
        if args.command == "down":
            return command_down(cfg, args.services or list(SERVICES))
        if args.command == "status":
            return command_status(cfg, args.json)
        for key, value in client_settings(cfg).items():
            print(f"export {key}={shlex.quote(value)}")
        return 0
    except StackError as exc:
        print(f"error: {exc}", file=sys.stderr)
        return 2


if __name__ == "__main__":
    sys.exit(main())
