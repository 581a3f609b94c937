"""Importing entivec changes nothing: no environment variable set, no settings copied, no folder made."""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

# Run in a fresh interpreter: this test session has imported everything already, and conftest sets variables.
# The libraries underneath are imported first: some set variables of their own on import (torch and
# scikit-learn the KMP_* ones of Intel's OpenMP, mlflow PYARROW_IGNORE_TIMEZONE and SPARK_LOCAL_IP). Those are
# theirs; the check is that entivec's own modules add nothing on top.
PROBE = r"""
import importlib, json, os, pkgutil, sys
before_files = sorted(os.listdir("."))
for library in ("numpy", "pandas", "pyarrow", "torch", "sklearn", "scipy", "mlflow", "mlflow.pyfunc", "prefect",
                "pandera", "matplotlib", "yaml", "typer", "rich", "safetensors", "threadpoolctl", "pydantic"):
    importlib.import_module(library)
before_env = dict(os.environ)
import entivec
names = ["entivec"]
for package in ("entivec", "entivec.schemas", "entivec.tasks", "entivec.flows"):
    module = importlib.import_module(package)
    names += [info.name for info in pkgutil.walk_packages(module.__path__, package + ".")]
for name in sorted(set(names)):
    importlib.import_module(name)
after_env = dict(os.environ)
changed = sorted(k for k in set(before_env) | set(after_env) if before_env.get(k) != after_env.get(k))
print(json.dumps({"modules": sorted(set(names)), "changed": changed,
                  "files_before": before_files, "files_after": sorted(os.listdir(".")),
                  "cwd": os.getcwd()}))
"""


def test_importing_every_module_leaves_environment_and_folder_alone(tmp_path):
    work = tmp_path / "work"
    work.mkdir()
    home = tmp_path / "home"
    home.mkdir()
    # A team settings file with a credential: before the fix, `import entivec` copied it into os.environ.
    settings = tmp_path / "team.env"
    settings.write_text("MLFLOW_TRACKING_USERNAME=someone\nMLFLOW_TRACKING_PASSWORD=not-a-real-secret\n")
    env = {key: value for key, value in os.environ.items()
           if not key.startswith(("ENTIVEC_", "PREFECT_", "MLFLOW_"))}
    env.update({"HOME": str(home), "ENTIVEC_SETTINGS": str(settings),
                # Prefect's own state for this probe: nowhere near the developer's or the session's.
                "PREFECT_HOME": str(tmp_path / "prefect-state"), "DO_NOT_TRACK": "true"})
    done = subprocess.run([sys.executable, "-c", PROBE], cwd=work, env=env, capture_output=True, text=True,
                          timeout=600)
    assert done.returncode == 0, done.stderr[-3000:]
    found = json.loads(done.stdout.strip().splitlines()[-1])
    assert {"entivec.cli", "entivec.settings", "entivec.flows.train", "entivec.tasks.lifecycle.registry"} <= set(
        found["modules"]), found["modules"]
    assert found["changed"] == [], f"importing entivec changed these environment variables: {found['changed']}"
    assert found["files_after"] == found["files_before"] == [], found["files_after"]
    assert Path(found["cwd"]) == work.resolve()


def test_the_command_applies_the_settings_when_it_runs(tmp_path):
    """What import no longer does, the command does: the settings file's values reach the process it runs."""
    settings = tmp_path / "team.env"
    settings.write_text(f"ENTIVEC_HOME={tmp_path / 'team-home'}\n")
    env = {key: value for key, value in os.environ.items()
           if not key.startswith(("ENTIVEC_", "PREFECT_", "MLFLOW_"))}
    env.update({"HOME": str(tmp_path), "ENTIVEC_SETTINGS": str(settings), "DO_NOT_TRACK": "true"})
    probe = ("import os, sys; from entivec import cli; sys.argv = ['entivec', '--help']\n"
             "try:\n    cli.main()\nexcept SystemExit:\n    pass\n"
             "print(os.environ.get('ENTIVEC_HOME'), os.environ.get('PREFECT_HOME'))")
    done = subprocess.run([sys.executable, "-c", probe], cwd=tmp_path, env=env, capture_output=True, text=True,
                          timeout=300)
    assert done.returncode == 0, done.stderr[-3000:]
    home, prefect_home = done.stdout.strip().splitlines()[-1].split()
    assert home == str(tmp_path / "team-home")
    assert prefect_home == str(tmp_path / "team-home" / "prefect")
