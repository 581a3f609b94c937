"""The audit history of a registered model: every alias move, append-only, stored in the registry itself.

Storage. Each entry is one tag of the registered model, ``entivec.audit.<seq>`` (six digits), holding the
entry as compact JSON: when, event, alias, from which version to which, who, why, the gate's verdict and
key figures, the data fingerprint. Once an entry's outcome is known, a second tag ``entivec.audit.<seq>.state``
records it (``done``, ``repaired``, ``abandoned`` or ``unresolved``). Neither key is ever written twice,
so the log only grows. Registered-model tags live in the tracking store's own tables on every MLflow
backend (SQLite, PostgreSQL/MySQL behind a tracking server, Databricks), so everyone who uses the same store
sees the same history and it survives restarts; nothing is kept in a private side file. (Anyone with write
access to the registry can still delete a tag by hand; guard the server with its own permissions.)

Atomic pairs. A move is written as intent first, then the alias moves, then the state is set:

    1. append entry (no state yet: pending)   2. move the alias   3. state = done

A crash after 1 leaves a pending entry. Every lifecycle command begins with ``repair``, which settles each
pending entry against the alias as it is now: at the entry's target → ``repaired`` (the move happened);
still at its origin → ``abandoned`` (it never did); anywhere else → ``unresolved``. ``repair`` then replays
the settled entries and, when an alias is not where the history says (moved with another tool, or its
version deleted), appends an ``outside_move`` entry, so the history and the aliases always agree.

Locking. Writes happen inside ``locked(name)``, which holds the model's lifecycle lock (``locks.py``).

Within the lock the appended entry is read back and checked against its writer's token, and a promotion
checks (compare-and-check) that production is still the version its gate judged against.
"""

from __future__ import annotations

import contextlib
import json
import uuid
from collections.abc import Callable, Iterator
from dataclasses import asdict, dataclass, field
from typing import Any

import pandas as pd

from entivec.lazytasks import tasks_on_first_use
from entivec.tasks.lifecycle import registry
from entivec.tasks.lifecycle.stamps import now_iso, operator

try:  # POSIX only; elsewhere the registry lease is used
    import fcntl
except ImportError:  # pragma: no cover - Windows
    fcntl = None  # type: ignore[assignment]
from entivec.tasks.lifecycle.locks import LEASE_SUFFIX, LOCK_MODE_VARIABLE, AuditError, lifecycle_lock  # noqa: F401

AUDIT_PREFIX = "entivec.audit."
STATE_SUFFIX = ".state"

EVENTS = ("train", "promote", "forced_promote", "rollback", "refused", "outside_move", "move",
          "incomplete_removed", "incomplete_completed", "report_failed")
SETTLED = ("done", "repaired")  # states of entries whose move happened
# Entries that record a fact about a version and move no alias.
NOT_MOVES = ("refused", "incomplete_completed", "report_failed")
# MLflow's SQL schema holds registered-model tag values in VARCHAR(5000); stay below it on every backend.
MAX_ENTRY_CHARS = 4800


class ConcurrentChange(AuditError):
    """An alias moved between the moment a decision was made and the moment it was to be applied."""


_ANY = object()


def _no_fault(point: str) -> None:
    """Hook between the steps of a move; tests replace it to simulate a crash at ``point``."""


_fault_hook: Callable[[str], None] = _no_fault


@dataclass
class AuditEntry:
    seq: int
    at: str
    event: str
    alias: str
    from_version: str | None
    to_version: str | None
    by: str
    reason: str
    verdict: str = "n/a"  # pass | fail | forced | n/a
    data_fingerprint: str = ""
    details: dict[str, Any] = field(default_factory=dict)
    token: str = ""
    state: str = "pending"
    state_note: str = ""
    state_at: str = ""

    def to_record(self) -> dict[str, Any]:
        return asdict(self)

    @property
    def moved(self) -> bool:
        """True when the alias really moved (a settled move; a refusal moves nothing)."""
        return self.state in SETTLED and self.event not in NOT_MOVES


def _entry_key(seq: int) -> str:
    return f"{AUDIT_PREFIX}{seq:06d}"


def _encode(entry: AuditEntry) -> str:
    body = {k: v for k, v in entry.to_record().items() if k not in ("seq", "state", "state_note", "state_at")}
    text = json.dumps(body, separators=(",", ":"), default=str, ensure_ascii=False)
    if len(text) > MAX_ENTRY_CHARS:
        # Keep the verdict's headline; the full evidence stays in the gate's evidence run.
        keep = ("figures", "evidence_run", "gate_data_fingerprint", "failed_checks")
        details = {k: entry.details[k] for k in keep if k in entry.details}
        details["truncated"] = True
        if "failed_checks" in details:
            details["failed_checks"] = details["failed_checks"][:5]
        body["details"] = details
        body["reason"] = body["reason"][:1000]
        text = json.dumps(body, separators=(",", ":"), default=str, ensure_ascii=False)
        if len(text) > MAX_ENTRY_CHARS:
            body["details"] = {k: details[k] for k in ("evidence_run", "truncated") if k in details}
            text = json.dumps(body, separators=(",", ":"), default=str, ensure_ascii=False)
    return text


def _model_tags(name: str) -> dict[str, str]:
    registry.check_name(name)
    try:
        return dict(registry.client().get_registered_model(name).tags)
    except registry.answer_types():
        registry.list_versions(name)  # raises the registry's own message for an unknown name
        raise


def read_history(name: str) -> list[AuditEntry]:
    """Every entry of ``name``'s history in order, as stored (no repair)."""
    tags = _model_tags(name)
    entries = []
    for key, value in tags.items():
        if not key.startswith(AUDIT_PREFIX) or key.endswith(STATE_SUFFIX):
            continue
        suffix = key.removeprefix(AUDIT_PREFIX)
        if not suffix.isdigit():
            continue
        body = json.loads(value)
        entry = AuditEntry(seq=int(suffix), **{k: v for k, v in body.items() if k in AuditEntry.__dataclass_fields__})
        state = tags.get(key + STATE_SUFFIX)
        if state:
            settled = json.loads(state)
            entry.state, entry.state_note, entry.state_at = settled["state"], settled.get("note", ""), settled["at"]
        entries.append(entry)
    return sorted(entries, key=lambda e: e.seq)


def replay(entries: list[AuditEntry]) -> dict[str, str]:
    """Where each alias stands according to the settled moves of the history."""
    where: dict[str, str] = {}
    for e in entries:
        if not e.moved:
            continue
        if e.to_version is None:
            where.pop(e.alias, None)
        else:
            where[e.alias] = e.to_version
    return where


def holders(entries: list[AuditEntry], alias: str = registry.PRODUCTION) -> list[str]:
    """The chain of versions an alias has held, oldest first; a rollback steps back one link.

    The last element is the alias's version now; the one before it is what a rollback restores.
    """
    chain: list[str] = []
    for e in entries:
        if not e.moved or e.alias != alias:
            continue
        if e.to_version is None:
            chain.clear()
        elif e.event == "rollback":
            if chain:
                chain.pop()
            if not chain or chain[-1] != e.to_version:
                chain.append(e.to_version)
        else:
            chain.append(e.to_version)
    return chain


# --- writing ----------------------------------------------------------------------------------------------------


class Session:
    """What may be done while holding a model's lifecycle lock; obtained from ``locked``."""

    def __init__(self, name: str) -> None:
        self.name = name

    def entries(self) -> list[AuditEntry]:
        return read_history(self.name)

    def aliases(self) -> dict[str, str]:
        return registry.aliases_of(self.name)

    def _append(self, entry: AuditEntry) -> AuditEntry:
        c = registry.client()
        tags = _model_tags(self.name)
        seqs = [int(k.removeprefix(AUDIT_PREFIX)) for k in tags
                if k.startswith(AUDIT_PREFIX) and k.removeprefix(AUDIT_PREFIX).isdigit()]
        entry.seq = max(seqs, default=0) + 1
        entry.token = uuid.uuid4().hex
        key = _entry_key(entry.seq)
        c.set_registered_model_tag(self.name, key, _encode(entry))
        stored = _model_tags(self.name).get(key, "")
        if json.loads(stored or "{}").get("token") != entry.token:
            raise AuditError(f"history entry {entry.seq} of {self.name!r} was written by another client at the "
                             "same time; is the lifecycle lock bypassed?")
        return entry

    def _settle(self, entry: AuditEntry, state: str, note: str = "") -> None:
        key = _entry_key(entry.seq) + STATE_SUFFIX
        if key in _model_tags(self.name):
            raise AuditError(f"history entry {entry.seq} of {self.name!r} is already settled")
        entry.state, entry.state_note, entry.state_at = state, note, now_iso()
        registry.client().set_registered_model_tag(
            self.name, key, json.dumps({"state": state, "note": note, "at": entry.state_at}, separators=(",", ":"))
        )

    def record(
        self,
        *,
        event: str,
        alias: str,
        from_version: str | None,
        to_version: str | None,
        by: str | None,
        reason: str,
        verdict: str = "n/a",
        data_fingerprint: str = "",
        details: dict[str, Any] | None = None,
    ) -> AuditEntry:
        """Append an entry that moves nothing (a refused promotion), settled at once."""
        entry = self._new(event, alias, from_version, to_version, by, reason, verdict, data_fingerprint, details)
        self._append(entry)
        self._settle(entry, "done")
        return entry

    def move(
        self,
        alias: str,
        version: str,
        *,
        event: str,
        by: str | None,
        reason: str,
        verdict: str = "n/a",
        data_fingerprint: str = "",
        details: dict[str, Any] | None = None,
        expected_from: Any = _ANY,
    ) -> AuditEntry:
        """Move ``alias`` to ``version`` with its history entry: intent, move, settle.

        ``expected_from`` (a version or None) makes the move conditional on where the alias stands now.
        """
        registry.check_alias(alias)
        version = str(version)
        # A missing version gets the registry's own message; a registration in progress moves its own alias.
        registry.resolve(self.name, version, allow_incomplete=True)
        current = self.aliases().get(alias)
        if expected_from is not _ANY and current != (None if expected_from is None else str(expected_from)):
            raise ConcurrentChange(
                f"{alias} of {self.name!r} moved meanwhile: it is {_v(current)}, expected {_v(expected_from)}; "
                "nothing was changed, run the command again to decide against the current state"
            )
        if current == version:
            raise AuditError(f"{alias} of {self.name!r} already points to version {version}; nothing to move")
        entry = self._new(event, alias, current, version, by, reason, verdict, data_fingerprint, details)
        self._append(entry)
        _fault_hook("before_move")
        registry.client().set_registered_model_alias(self.name, alias, version)
        _fault_hook("after_move")
        self._settle(entry, "done")
        return entry

    def _new(self, event, alias, from_version, to_version, by, reason, verdict, data_fingerprint, details):
        if event not in EVENTS:
            raise ValueError(f"unknown history event {event!r}; expected one of {', '.join(EVENTS)}")
        return AuditEntry(
            seq=0,
            at=now_iso(),
            event=event,
            alias=alias,
            from_version=None if from_version is None else str(from_version),
            to_version=None if to_version is None else str(to_version),
            by=by or operator(),
            reason=reason,
            verdict=verdict,
            data_fingerprint=data_fingerprint or "",
            details=dict(details or {}),
        )

    def repair(self) -> list[AuditEntry]:
        """Settle interrupted moves and record moves made outside entivec; returns the entries written or settled."""
        touched: list[AuditEntry] = []
        aliases = self.aliases()
        entries = self.entries()
        for e in entries:
            if e.state != "pending":
                continue
            now = aliases.get(e.alias)
            if now == e.to_version:
                self._settle(e, "repaired", "interrupted after the alias moved; the move stands (settled by repair)")
            elif now == e.from_version:
                self._settle(e, "abandoned", "interrupted before the alias moved; nothing changed")
            else:
                self._settle(e, "unresolved", f"interrupted; {e.alias} was found at {_v(now)}")
            touched.append(e)
        touched += self.settle_incomplete(entries)
        aliases = self.aliases()
        entries = self.entries()
        expected = replay(entries)
        for alias in sorted(set(expected) | set(aliases) & {registry.STAGING, registry.PRODUCTION}):
            if aliases.get(alias) != expected.get(alias):
                touched.append(
                    self.record(
                        event="outside_move",
                        alias=alias,
                        from_version=expected.get(alias),
                        to_version=aliases.get(alias),
                        by="unknown",
                        reason=f"found by entivec: {alias} is at {_v(aliases.get(alias))} but the history left it "
                        f"at {_v(expected.get(alias))} (moved by another tool, or its version deleted)",
                    )
                )
        return touched


    def settle_incomplete(self, entries: list[AuditEntry]) -> list[AuditEntry]:
        """Remove or complete versions whose registration died (killed, or its store failed), with an entry each.

        A version whose owner process still runs is left alone. One that holds an alias its settled ``train``
        entry gave it lacked only the final mark, so it is completed; any other is removed (with any alias on
        it).
        """
        touched: list[AuditEntry] = []
        aliases = self.aliases()
        for mv in registry.client().search_model_versions(f"name = '{self.name}'"):
            if not registry.is_incomplete(mv) or registry.registration_alive(mv):
                continue
            version = str(mv.version)
            held = sorted(a for a, v in aliases.items() if v == version)
            recorded = [e for e in entries if e.event == "train" and e.to_version == version and e.moved]
            owner = (mv.tags or {}).get(registry.OWNER_TAG, "unknown")
            if recorded and recorded[-1].alias in held:
                note = (f"registration by {owner} stopped after its {recorded[-1].alias} move (history entry "
                        f"{recorded[-1].seq}) and before its final mark; completed by repair")
                registry.mark_complete(self.name, version, note)
                touched.append(self.record(
                    event="incomplete_completed", alias=recorded[-1].alias, from_version=version,
                    to_version=version, by="entivec", reason=note, details={"run_id": mv.run_id}))
            else:
                note = (f"registration by {owner} never finished (no settled train entry for it); the incomplete "
                        f"version was removed" + (f" with its alias {', '.join(held)}" if held else ""))
                registry.client().delete_model_version(self.name, version)
                touched.append(self.record(
                    event="incomplete_removed", alias=held[0] if held else "-", from_version=version,
                    to_version=None, by="entivec", reason=note, details={"run_id": mv.run_id}))
        return touched


def _v(version: Any) -> str:
    return "no version" if version is None else f"version {version}"


@contextlib.contextmanager
def locked(name: str, *, timeout: float = 300.0, repair: bool = True) -> Iterator[Session]:
    """Hold ``name``'s lifecycle lock; the history is repaired first unless ``repair`` is False."""
    registry.check_name(name)
    registry.end_abandoned_runs(name)  # runs a killed process left RUNNING, even before any version exists
    registry.list_versions(name)  # an unknown model gets a clear message before any lock is taken
    with lifecycle_lock(name, timeout):
        session = Session(name)
        if repair:
            session.repair()
        yield session


def record_move(
    name: str,
    alias: str,
    version: str,
    *,
    event: str,
    by: str | None = None,
    reason: str = "",
    details: dict[str, Any] | None = None,
    data_fingerprint: str = "",
    verdict: str = "n/a",
) -> AuditEntry:
    """Move an alias and record it in the history, as one locked, crash-safe step (e.g. train → staging)."""
    with locked(name) as session:
        return session.move(
            alias, version, event=event, by=by, reason=reason, details=details,
            data_fingerprint=data_fingerprint, verdict=verdict,
        )


# No retries: a move is not blindly repeated; the repair step settles an interrupted one.
# ``record_move_task``: ``record_move`` as a Prefect task, made when a flow first asks for it, so reading the
# history does not load Prefect.
__getattr__ = tasks_on_first_use(globals(), record_move_task=(record_move, {"name": "record-alias-move"}))


def history(name: str, *, repair: bool = True) -> list[AuditEntry]:
    """The history of ``name``, repaired first (under the lock) unless ``repair`` is False."""
    if not repair:
        return read_history(name)
    with locked(name) as session:
        return session.entries()


def record_note(name: str, version: str, *, event: str, reason: str, details: dict[str, Any] | None = None,
                alias: str = registry.STAGING) -> AuditEntry:
    """Record a fact about a version that moves no alias (e.g. its report could not be written)."""
    with locked(name) as session:
        return session.record(event=event, alias=alias, from_version=version, to_version=version, by=None,
                              reason=reason, details=details)


# --- showing ----------------------------------------------------------------------------------------------------


def figures_text(details: dict[str, Any]) -> str:
    """The gate's headline figures of an entry as one line."""
    figures = details.get("figures") or {}
    parts = [f"{k} {v}" for k, v in figures.items()]
    failed = details.get("failed_checks") or []
    if failed:
        parts.append("failed: " + "; ".join(failed))
    return "; ".join(parts)


def history_frame(entries: list[AuditEntry]) -> pd.DataFrame:
    """One row per entry, for tables and CSV (details flattened to text)."""
    columns = ["seq", "at", "event", "alias", "from_version", "to_version", "by", "reason", "verdict",
               "figures", "data_fingerprint", "evidence_run", "state", "state_note"]
    rows = [
        {
            "seq": e.seq,
            "at": e.at,
            "event": e.event,
            "alias": e.alias,
            "from_version": e.from_version or "",
            "to_version": e.to_version or "",
            "by": e.by,
            "reason": e.reason,
            "verdict": e.verdict,
            "figures": figures_text(e.details),
            "data_fingerprint": e.data_fingerprint,
            "evidence_run": e.details.get("evidence_run", ""),
            "state": e.state,
            "state_note": e.state_note,
        }
        for e in entries
    ]
    return pd.DataFrame(rows, columns=columns)


def history_json(entries: list[AuditEntry]) -> str:
    return json.dumps([e.to_record() for e in entries], indent=1, default=str, ensure_ascii=False)
