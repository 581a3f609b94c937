"""The audit history: append-only entries in the registry, crash repair, outside moves, locks, many processes."""

from __future__ import annotations

import json
import os
import subprocess
import sys
import textwrap
from datetime import UTC, datetime, timedelta

import pytest

MODEL = "depot-vectors"


def _register(name: str, versions: int) -> None:
    """Versions that exist in the registry (their content does not matter to the history)."""
    from entivec.tasks.lifecycle import registry

    c = registry.client()
    run = c.create_run(registry.experiment_for(name))
    c.create_registered_model(name)
    for _ in range(versions):
        c.create_model_version(name, f"runs:/{run.info.run_id}/lookup_model", run_id=run.info.run_id)


@pytest.fixture
def store(entivec_home):
    _register(MODEL, 4)
    return entivec_home


def _tags() -> dict[str, str]:
    from entivec.tasks.lifecycle import registry

    return dict(registry.client().get_registered_model(MODEL).tags)


def test_history_follows_a_scripted_sequence(store):
    from entivec.tasks.lifecycle import audit, registry

    audit.record_move(MODEL, "staging", "1", event="train", by="ana", reason="first data")
    audit.record_move(MODEL, "production", "1", event="promote", by="ana", reason="first release",
                      verdict="pass", details={"figures": {"rows": "900"}})
    audit.record_move(MODEL, "staging", "2", event="train", by="ben", reason="May data")
    with audit.locked(MODEL) as session:
        session.record(event="refused", alias="production", from_version="1", to_version="2", by="ben",
                       reason="try", verdict="fail", details={"failed_checks": ["gain over production"]})
    audit.record_move(MODEL, "production", "2", event="forced_promote", by="ben", reason="hotfix", verdict="forced")
    audit.record_move(MODEL, "production", "1", event="rollback", by="ana", reason="bad hotfix")

    entries = audit.history(MODEL)
    expected = [
        ("train", "staging", None, "1", "ana"),
        ("promote", "production", None, "1", "ana"),
        ("train", "staging", "1", "2", "ben"),
        ("refused", "production", "1", "2", "ben"),
        ("forced_promote", "production", "1", "2", "ben"),
        ("rollback", "production", "2", "1", "ana"),
    ]
    assert [(e.event, e.alias, e.from_version, e.to_version, e.by) for e in entries] == expected
    assert [e.seq for e in entries] == list(range(1, 7))
    assert all(e.state == "done" for e in entries)
    assert audit.replay(entries) == registry.aliases_of(MODEL) == {"staging": "2", "production": "1"}
    assert audit.holders(entries) == ["1"]  # the rollback stepped back over the forced promotion

    frame = audit.history_frame(entries)
    assert list(frame["event"]) == [e[0] for e in expected]
    assert frame.loc[3, "figures"] == "failed: gain over production"
    assert json.loads(audit.history_json(entries))[1]["details"]["figures"] == {"rows": "900"}


def test_entries_are_never_rewritten(store):
    from entivec.tasks.lifecycle import audit

    audit.record_move(MODEL, "production", "1", event="promote", reason="one")
    before = _tags()
    audit.record_move(MODEL, "production", "3", event="promote", reason="two")
    after = _tags()
    assert {k: after[k] for k in before} == before  # every earlier key kept its value
    assert set(after) - set(before) == {"entivec.audit.000002", "entivec.audit.000002.state"}
    with audit.locked(MODEL) as session, pytest.raises(audit.AuditError, match="already settled"):
        session._settle(session.entries()[0], "done")


def test_a_move_interrupted_after_the_alias_moved_is_repaired(store, monkeypatch):
    from entivec.tasks.lifecycle import audit, registry

    audit.record_move(MODEL, "production", "1", event="promote", reason="one")

    def crash(point: str) -> None:
        if point == "after_move":
            raise KeyboardInterrupt("power cut")

    monkeypatch.setattr(audit, "_fault_hook", crash)
    with pytest.raises(KeyboardInterrupt):
        audit.record_move(MODEL, "production", "2", event="promote", by="cy", reason="two")
    monkeypatch.setattr(audit, "_fault_hook", audit._no_fault)

    assert registry.aliases_of(MODEL)["production"] == "2"
    assert audit.read_history(MODEL)[-1].state == "pending"  # as the crash left it
    entries = audit.history(MODEL)  # repairs first
    last = entries[-1]
    assert (last.event, last.from_version, last.to_version, last.by, last.state) == ("promote", "1", "2", "cy",
                                                                                     "repaired")
    assert audit.replay(entries) == registry.aliases_of(MODEL)
    assert len(audit.history(MODEL)) == len(entries)  # nothing more to repair


def test_a_move_interrupted_before_the_alias_moved_is_abandoned(store, monkeypatch):
    from entivec.tasks.lifecycle import audit, registry

    audit.record_move(MODEL, "production", "1", event="promote", reason="one")

    def crash(point: str) -> None:
        if point == "before_move":
            raise RuntimeError("connection lost")

    monkeypatch.setattr(audit, "_fault_hook", crash)
    with pytest.raises(RuntimeError):
        audit.record_move(MODEL, "production", "2", event="promote", reason="two")
    monkeypatch.setattr(audit, "_fault_hook", audit._no_fault)

    entries = audit.history(MODEL)
    assert entries[-1].state == "abandoned" and registry.aliases_of(MODEL)["production"] == "1"
    assert audit.holders(entries) == ["1"]


def test_moves_made_with_another_tool_are_recorded(store):
    from entivec.tasks.lifecycle import audit, registry

    audit.record_move(MODEL, "production", "1", event="promote", reason="one")
    registry.client().set_registered_model_alias(MODEL, "production", "3")  # e.g. from the MLflow UI
    entries = audit.history(MODEL)
    last = entries[-1]
    assert (last.event, last.from_version, last.to_version, last.by) == ("outside_move", "1", "3", "unknown")
    assert audit.replay(entries) == registry.aliases_of(MODEL)
    assert audit.holders(entries) == ["1", "3"]


def _child(code: str, **env: str) -> subprocess.Popen:
    return subprocess.Popen([sys.executable, "-c", textwrap.dedent(code)], env={**os.environ, **env},
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)


def test_a_process_killed_between_move_and_record_is_repaired(store):
    from entivec.tasks.lifecycle import audit, registry

    audit.record_move(MODEL, "production", "1", event="promote", reason="one")
    # The child dies for real (os._exit: no clean-up, no finally) right after moving the alias.
    child = _child(f"""
        import os
        from entivec.tasks.lifecycle import audit
        audit._fault_hook = lambda point: os._exit(17) if point == "after_move" else None
        audit.record_move({MODEL!r}, "production", "4", event="promote", by="dora", reason="crash test")
    """)
    out, err = child.communicate(timeout=240)
    assert child.returncode == 17, err
    assert registry.aliases_of(MODEL)["production"] == "4"
    # The OS released the child's file lock; the next command repairs the record.
    entries = audit.history(MODEL)
    assert (entries[-1].to_version, entries[-1].by, entries[-1].state) == ("4", "dora", "repaired")


WORKER = """
    import random, sys
    from entivec.tasks.lifecycle import audit
    rng = random.Random(int(sys.argv[1]) if len(sys.argv) > 1 else {seed})
    for i in range({moves}):
        with audit.locked({model!r}) as session:
            current = session.aliases().get("production")
            target = rng.choice([v for v in ("1", "2", "3", "4") if v != current])
            session.move("production", target, event="promote", by="worker-{seed}", reason=f"move {{i}}")
"""


@pytest.mark.parametrize(("mode", "workers"), [("file", 3), ("registry", 2)])
def test_concurrent_processes_never_leave_history_and_aliases_disagreeing(store, mode, workers):
    from entivec.tasks.lifecycle import audit, registry

    moves = 4
    children = [_child(WORKER.format(seed=s, moves=moves, model=MODEL), ENTIVEC_LIFECYCLE_LOCK=mode)
                for s in range(workers)]
    for child in children:
        _, err = child.communicate(timeout=400)
        assert child.returncode == 0, err
    entries = audit.history(MODEL)
    assert len(entries) == workers * moves and [e.seq for e in entries] == list(range(1, workers * moves + 1))
    assert all(e.state == "done" for e in entries)
    # Each move starts where the one before it ended: no two processes decided from the same state.
    for before, after in zip(entries, entries[1:], strict=False):
        assert after.from_version == before.to_version
    assert entries[0].from_version is None
    assert registry.aliases_of(MODEL)["production"] == entries[-1].to_version
    assert {e.by for e in entries} == {f"worker-{s}" for s in range(workers)}
    assert not any(m.name.endswith(audit.LEASE_SUFFIX) for m in registry.client().search_registered_models())


def test_file_lock_times_out_with_a_clear_message(store):
    from entivec.tasks.lifecycle import audit

    with audit.locked(MODEL), pytest.raises(audit.AuditError, match="locked by another lifecycle command"):
        with audit.locked(MODEL, timeout=0.3):
            pass


def test_registry_lease_blocks_expires_and_is_removed(store, monkeypatch):
    from entivec.tasks.lifecycle import audit, registry

    monkeypatch.setenv(audit.LOCK_MODE_VARIABLE, "registry")
    lease = MODEL + audit.LEASE_SUFFIX
    c = registry.client()
    with audit.locked(MODEL):
        assert c.get_registered_model(lease).tags["entivec.lease.holder"]
        with pytest.raises(audit.AuditError, match="locked by another lifecycle command"):
            with audit.locked(MODEL, timeout=0.3):
                pass
    assert lease not in {m.name for m in c.search_registered_models()}

    # A lease left behind by a crashed client expires and is broken by the next one.
    past = (datetime.now(UTC) - timedelta(minutes=1)).isoformat(timespec="seconds")
    c.create_registered_model(lease, tags={"entivec.lease.token": "dead", "entivec.lease.expires": past})
    with audit.locked(MODEL, timeout=5):
        assert c.get_registered_model(lease).tags["entivec.lease.token"] != "dead"
    assert lease not in {m.name for m in c.search_registered_models()}


def test_names_aliases_and_versions_are_checked(store):
    from entivec.tasks.lifecycle import audit, registry

    with pytest.raises(registry.RegistryError, match="not valid"):
        audit.history("bad name!")
    with pytest.raises(registry.RegistryError, match="no registered model named 'other'"):
        audit.history("other")
    with pytest.raises(registry.RegistryError, match="alias 'v2' is not valid"):
        audit.record_move(MODEL, "v2", "1", event="move")
    with pytest.raises(registry.RegistryError, match="has no version 9"):
        audit.record_move(MODEL, "production", "9", event="promote")
    with pytest.raises(ValueError, match="unknown history event"):
        audit.record_move(MODEL, "production", "1", event="nudge")
    audit.record_move(MODEL, "production", "1", event="promote")
    with pytest.raises(audit.AuditError, match="already points to version 1"):
        audit.record_move(MODEL, "production", "1", event="promote")
    assert len(audit.history(MODEL)) == 1  # refused requests wrote nothing


def test_a_large_entry_stays_within_the_tag_limit(store):
    from entivec.tasks.lifecycle import audit

    details = {"figures": {"rows": "5000"}, "failed_checks": [f"check {i} " * 20 for i in range(200)],
               "evidence_run": "abc", "notes": "x" * 20_000}
    entry = audit.record_move(MODEL, "production", "2", event="forced_promote", reason="r" * 3000, details=details)
    stored = _tags()[f"entivec.audit.{entry.seq:06d}"]
    assert len(stored) <= audit.MAX_ENTRY_CHARS
    kept = audit.history(MODEL)[-1].details
    assert kept["figures"] == {"rows": "5000"} and kept["evidence_run"] == "abc" and kept["truncated"]
