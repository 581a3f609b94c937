"""Start-up of `entivec` and of each command that only reads, side by side, with the machine's load beside each.

Registers two versions of an invented model (per-category means of the demo's generated deliveries, no
training) in a temporary project folder, then times, in fresh processes and in one run:

- the bare interpreter (`python -c pass`): the floor every command pays;
- `import entivec.cli` and `entivec --help`;
- versions, runs, history, export, diff, report (of an existing version) and check (a spec and its header).

For each it prints the median wall time of ``--repeats`` runs, the ratio to the bare interpreter, the ratio to
the 3 s target, the 1-minute load average when it ran, and which heavy libraries the command imported
(read from ``python -X importtime``). No Prefect server is started by any of them.

    python benchmarks/bench_startup.py [--repeats 3] [--rows 5000]
"""

from __future__ import annotations

import argparse
import os
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

HEAVY = ("torch", "sklearn", "prefect", "mlflow", "matplotlib", "distributed")
TARGET_SECONDS = 3.0


def _env(home: Path) -> dict[str, str]:
    env = {k: v for k, v in os.environ.items() if not k.startswith(("MLFLOW_TRACKING", "MLFLOW_REGISTRY",
                                                                      "PREFECT_API_URL", "ENTIVEC_"))}
    env.update({"ENTIVEC_HOME": str(home), "PREFECT_HOME": str(home / "prefect"), "DO_NOT_TRACK": "true",
                "PREFECT_SERVER_ANALYTICS_ENABLED": "false", "MLFLOW_DISABLE_TELEMETRY": "true",
                "PREFECT_SERVER_EPHEMERAL_STARTUP_TIMEOUT_SECONDS": "90"})
    return env


def _register(home: Path, rows: int) -> tuple[str, Path]:
    """Two versions of the model 'deliveries-bench' from the generated demo table; returns name and spec."""
    os.environ.update(_env(home))
    import numpy as np
    import pandas as pd

    from entivec.demo import write_demo
    from entivec.schemas.spec import load_spec
    from entivec.schemas.vector_set import VectorSet
    from entivec.schemas.vocabulary import Vocabulary
    from entivec.tasks.lifecycle import registry
    from entivec.tasks.lifecycle.track import register_version

    spec_path = write_demo(home / "demo", rows=rows)
    spec = load_spec(spec_path)
    frames = [pd.read_csv(p, dtype=str) for p in sorted((home / "demo").glob("deliveries-*.csv"))]
    frame = pd.concat(frames, ignore_index=True)
    target = pd.to_numeric(frame[spec.target.column], errors="coerce").fillna(0.0)
    name = spec.name
    for version, half in ((1, 0), (2, 1)):
        part = frame.iloc[half::2]
        vocabularies, vectors = {}, {}
        for column in spec.embed_names:
            vocab = Vocabulary.build(column, part[column])
            ids = vocab.encode(part[column])
            means = target.iloc[half::2].groupby(ids).agg(["mean", "std"]).fillna(0.0)
            matrix = np.zeros((vocab.size, 2), dtype=np.float32)
            matrix[means.index.to_numpy()] = means.to_numpy(dtype=np.float64)
            vocabularies[column], vectors[column] = vocab, matrix
        folder = VectorSet(vocabularies, vectors, {"model_name": name}).save(home / f"v{version}" / "vector_set")
        client = registry.client()
        run = client.create_run(registry.experiment_for(name), run_name=f"bench v{version}")
        client.log_artifacts(run.info.run_id, str(folder), artifact_path=registry.VECTOR_SET_ARTIFACT)
        client.set_terminated(run.info.run_id)
        registered = register_version(spec=spec, run_id=run.info.run_id, vector_set_folder=folder, version_tags={})
        registry.mark_complete(name, registered)  # registration is intent-first: a train run ends with this step
    registry.set_alias(name, registry.PRODUCTION, "1")
    registry.set_alias(name, registry.STAGING, "2")
    return name, spec_path


def _time(argv: list[str], env: dict[str, str], repeats: int) -> tuple[float, float, int]:
    times, loads, code = [], [], 0
    for _ in range(repeats):
        loads.append(os.getloadavg()[0])
        start = time.perf_counter()
        done = subprocess.run(argv, env=env, capture_output=True, text=True, timeout=600)
        times.append(time.perf_counter() - start)
        code = done.returncode
    return statistics.median(times), statistics.mean(loads), code


def _heavy_imports(argv: list[str], env: dict[str, str]) -> str:
    done = subprocess.run([argv[0], "-X", "importtime", *argv[1:]], env=env, capture_output=True, text=True,
                          timeout=600)
    loaded = {line.rsplit("|", 1)[-1].strip() for line in done.stderr.splitlines() if "import time:" in line}
    return ",".join(h for h in HEAVY if h in loaded) or "none"


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeats", type=int, default=3)
    parser.add_argument("--rows", type=int, default=5_000)
    args = parser.parse_args()
    home = Path(tempfile.mkdtemp(prefix="entivec-bench-startup-"))
    name, spec_path = _register(home, args.rows)
    env = _env(home)
    py = sys.executable
    cli = [py, "-m", "entivec.cli"]
    cases = [
        ("python -c pass", [py, "-c", "pass"]),
        ("import entivec.cli", [py, "-c", "import entivec.cli"]),
        ("entivec --help", [*cli, "--help"]),
        ("entivec versions", [*cli, "versions", name]),
        ("entivec runs", [*cli, "runs", name]),
        ("entivec history", [*cli, "history", name]),
        ("entivec export", [*cli, "export", name, "production", "--out", str(home / "export")]),
        ("entivec diff", [*cli, "diff", name, "1", "2"]),
        ("entivec report", [*cli, "report", name, "1", "--out", str(home / "report.html")]),
        ("entivec check", [*cli, "check", str(spec_path)]),
    ]
    print(f"{'command':<20} {'median s':>9} {'x python':>9} {'x 3 s':>7} {'load':>6} {'exit':>5}  heavy imports")
    floor = None
    for label, argv in cases:
        seconds, load, code = _time(argv, env, args.repeats)
        floor = floor or seconds
        heavy = _heavy_imports(argv, env)
        print(f"{label:<20} {seconds:9.2f} {seconds / floor:9.1f} {seconds / TARGET_SECONDS:7.2f} {load:6.2f} "
              f"{code:5d}  {heavy}", flush=True)
    print(f"(cores: {os.cpu_count()}; load = 1-minute load average while the command ran; project folder {home})")


if __name__ == "__main__":
    main()
