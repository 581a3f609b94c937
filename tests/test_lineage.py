"""MLflow's own lineage on entivec's runs: dataset inputs on train and gate runs, gate thresholds as params.

Checked through MLflow's documented query language, as any MLflow user would find the runs: runs can be
searched by ``dataset.name``, ``dataset.digest`` and ``dataset.context`` (MLflow documentation, "Search Runs",
dataset filters), and an input's context lives in the input tag ``mlflow.data.context``.
"""

from __future__ import annotations

import hashlib
import json

import pandas as pd


def _sha(text: str) -> str:
    return hashlib.sha256(text.encode()).hexdigest()  # FIPS 180-4 SHA-256 via Python's hashlib


def test_train_run_records_its_data_as_an_mlflow_dataset_input(entivec_home, tmp_path):
    from entivec.schemas.spec import spec_from_dict
    from entivec.tasks.lifecycle import registry
    from entivec.tasks.lifecycle.track import record_run

    spec = spec_from_dict({
        "name": "lineage-demo", "source": {"path": "drops/2026-*.csv"}, "id_column": "delivery",
        "target": {"column": "cases", "task": "regression"}, "columns": {"embed": ["depot"]},
    })
    bundle = tmp_path / "bundle"
    bundle.mkdir()
    (bundle / "summary.md").write_text("nothing trained here: a lineage check")
    fingerprint = {"sha256": _sha("invented rows"), "rows": 1234}
    run_id = record_run(spec=spec, bundle=bundle, fingerprint=fingerprint, ledger={
        "rows_in": 1234, "rows_used": 1234, "rows_quarantined": 0}, history=[], metrics={}, summary="check")
    c = registry.client()
    inputs = c.get_run(run_id).inputs.dataset_inputs
    assert len(inputs) == 1
    dataset = inputs[0].dataset
    assert dataset.name == "lineage-demo" and dataset.digest == fingerprint["sha256"][:32]
    assert '"drops/2026-*.csv"' in dataset.source and dataset.source_type == "local"
    assert {t.key: t.value for t in inputs[0].tags} == {"mlflow.data.context": "training"}
    assert json.loads(dataset.profile) == {"sha256": fingerprint["sha256"], "rows": 1234}  # the full fingerprint
    experiment = registry.experiment_for("lineage-demo")
    found = c.search_runs([experiment], filter_string=(
        f"dataset.digest = '{fingerprint['sha256'][:32]}' and dataset.context = 'training'"))
    assert [r.info.run_id for r in found] == [run_id]
    assert c.search_runs([experiment], filter_string="dataset.context = 'evaluation'") == []


def test_gate_run_logs_thresholds_as_params_and_its_judged_data(entivec_home):
    from entivec.schemas.promotion import PromotionSpec
    from entivec.tasks.lifecycle import registry
    from entivec.tasks.lifecycle.gate import GateResult
    from entivec.tasks.present.report import record_gate_evidence

    policy = PromotionSpec(min_gain_over_baseline=0.03, max_drift=0.5)
    result = GateResult(
        name="lineage-demo", candidate_version="2", production_version="1", passed=False, checks=[], intervals={},
        downstream=pd.DataFrame(), comparisons={}, production_expectations=[], rows=800, rows_note="", how="",
        primary_metric="rmse", data_fingerprint=_sha("held-out rows"), policy=policy.model_dump(mode="json"),
        data_source="drops/2026-12/*.csv",
    )
    run_id = record_gate_evidence(result, by="tester", reason="lineage check", forced=False, spec_path="s.yaml")
    c = registry.client()
    run = c.get_run(run_id)
    params = run.data.params
    # the spec's thresholds, as given above, and a default the spec did not set
    assert params["promotion.min_gain_over_baseline"] == "0.03" and params["promotion.max_drift"] == "0.5"
    assert params["promotion.confidence"] == str(PromotionSpec().confidence)
    assert set(params) == {k for k in params if k.startswith("promotion.")}
    dataset = run.inputs.dataset_inputs[0]
    assert {t.key: t.value for t in dataset.tags} == {"mlflow.data.context": "evaluation"}
    assert dataset.dataset.digest == _sha("held-out rows")[:32] and "drops/2026-12/*.csv" in dataset.dataset.source
