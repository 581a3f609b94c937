"""How long a registry read takes to give up on a tracking server that is down: entivec's bounded call vs a plain
``MlflowClient`` with MLflow's own retry settings, side by side in one run, with the machine load beside each.

    python benchmarks/bench_registry.py            # both (the plain client takes about four minutes)
    python benchmarks/bench_registry.py --quick    # entivec's call only, three times

Nothing listens on the port (bound, then released), so every attempt is refused at once: what is measured is the
retry and back-off policy, not the network.
"""

from __future__ import annotations

import argparse
import os
import socket
import tempfile
import time


def closed_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as sock:
        sock.bind(("127.0.0.1", 0))
        return sock.getsockname()[1]


def load() -> str:
    return "load " + " ".join(f"{x:.2f}" for x in os.getloadavg())


def time_failure(call) -> tuple[float, str]:
    started = time.monotonic()
    try:
        call()
    except Exception as exc:  # noqa: BLE001 - the failure is what is measured
        return time.monotonic() - started, f"{type(exc).__name__}: {str(exc).splitlines()[0][:110]}"
    return time.monotonic() - started, "no failure (something listens on the port?)"


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="entivec's bounded call only")
    args = parser.parse_args()
    os.environ.setdefault("ENTIVEC_HOME", tempfile.mkdtemp(prefix="bench-registry-"))
    os.environ["MLFLOW_TRACKING_URI"] = uri = f"http://127.0.0.1:{closed_port()}"
    for key in [k for k in os.environ if k.startswith("MLFLOW_HTTP_REQUEST_")]:
        del os.environ[key]  # MLflow's defaults for the plain client

    from mlflow.tracking import MlflowClient

    from entivec.tasks.lifecycle import registry

    print(f"tracking server {uri} (closed port); ENTIVEC_REGISTRY_TIMEOUT={registry.registry_timeout():g} s")
    bounded = []
    for _ in range(1 if not args.quick else 3):
        seconds, what = time_failure(lambda: registry.list_versions("bench-model"))
        bounded.append(seconds)
        print(f"entivec registry.list_versions: {seconds:7.1f} s  ({load()})  {what}")
    if args.quick:
        return
    plain, what = time_failure(lambda: MlflowClient(tracking_uri=uri, registry_uri=uri).get_registered_model("m"))
    print(f"plain MlflowClient (defaults):  {plain:7.1f} s  ({load()})  {what}")
    print(f"ratio plain / entivec: {plain / min(bounded):.0f}x")


if __name__ == "__main__":
    main()
