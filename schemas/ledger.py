"""The row ledger: where every input row went. rows in = rows used + rows quarantined, always."""

from __future__ import annotations

from dataclasses import asdict, dataclass, field


class LedgerMismatch(RuntimeError):
    """The counts do not add up: some row was lost or counted twice."""


@dataclass
class LedgerStep:
    """One step of ingestion or cleaning and what it did.

    ``action`` is ``quarantine`` (rows removed, each with this reason), ``fill`` (values filled in place),
    or ``report`` (rows flagged but kept, e.g. nulls a conditional fill was not allowed to fill).
    """

    step: str
    action: str
    rows: int
    detail: str = ""


EXAMPLES_AT = "e.g. "  # how tasks/ingest/clean.py's examples() begins its row references
EXAMPLES = 5  # tasks/ingest/common.py EXAMPLES: row references quoted in a ledger step
_MORE = ", ..."


def _refs(detail: str) -> tuple[str, list[str], bool, str] | None:
    """(text before the examples, the row references, whether more were left out, text after) of a detail."""
    at = detail.rfind(EXAMPLES_AT)
    if at < 0:
        return None
    body = detail[at + len(EXAMPLES_AT):]
    tail = ""
    end = body.find(";")  # a detail may go on after its examples (a fill's "; filled ..." part)
    if end >= 0:
        body, tail = body[:end], body[end:]
    more = body.endswith(_MORE)
    body = body[: -len(_MORE)] if more else body
    return detail[:at], [r for r in body.split(", ") if r], more, tail


def merged_detail(first: str, second: str) -> str:
    """One step's detail of two batches read in order: the first's text, the examples of both (at most EXAMPLES, with
    ", ..." when more rows had them), as ``examples()`` would have written on both batches read as one."""
    a, b = _refs(first), _refs(second)
    if b is None:
        return first
    if a is None:  # the first batch had no row of the step: its text is the second's without examples
        return second if second.startswith(first) else first
    if a[0] != b[0] or a[3] != b[3]:
        return first
    refs = a[1] + b[1]
    more = a[2] or b[2] or len(refs) > EXAMPLES
    return f"{a[0]}{EXAMPLES_AT}{', '.join(refs[:EXAMPLES])}{_MORE if more else ''}{a[3]}"


@dataclass
class Ledger:
    rows_in: int
    files: list[str] = field(default_factory=list)
    steps: list[LedgerStep] = field(default_factory=list)
    rows_quarantined: int = 0

    def record(self, step: str, action: str, rows: int, detail: str = "") -> None:
        self.steps.append(LedgerStep(step, action, int(rows), detail))

    @property
    def rows_used(self) -> int:
        return self.rows_in - self.rows_quarantined

    def quarantined_by_reason(self) -> dict[str, int]:
        return {s.step: s.rows for s in self.steps if s.action == "quarantine"}

    def check(self, rows_used: int, rows_quarantined: int) -> None:
        """Fail loudly unless the table that goes on and the quarantine account for every input row."""
        if rows_quarantined != self.rows_quarantined or rows_used + rows_quarantined != self.rows_in:
            raise LedgerMismatch(
                f"row ledger does not add up: {self.rows_in} in, {rows_used} used + "
                f"{rows_quarantined} quarantined (ledger says {self.rows_quarantined} quarantined)"
            )

    def add(self, part: Ledger) -> None:
        """Add the ledger of one more batch of the same table: rows summed, each step's rows summed under the step
        and action it was first recorded with; the row examples of its detail are those of the batches in order,
        at most ``EXAMPLES`` of them, so the sum reads as the ledger of the table read whole."""
        self.rows_in += part.rows_in
        self.rows_quarantined += part.rows_quarantined
        for name in part.files:
            if name not in self.files:
                self.files.append(name)
        index = {(s.step, s.action): s for s in self.steps}
        for step in part.steps:
            known = index.get((step.step, step.action))
            if known is None:
                known = LedgerStep(step.step, step.action, 0, step.detail)
                self.steps.append(known)
                index[(step.step, step.action)] = known
            elif known.rows or step.rows:
                known.detail = merged_detail(known.detail, step.detail)
            known.rows += step.rows

    def to_dict(self) -> dict:
        return {
            "rows_in": self.rows_in,
            "rows_used": self.rows_used,
            "rows_quarantined": self.rows_quarantined,
            "files": self.files,
            "steps": [asdict(s) for s in self.steps],
        }

    @classmethod
    def from_dict(cls, data: dict) -> Ledger:
        ledger = cls(rows_in=int(data["rows_in"]), files=list(data.get("files", [])))
        ledger.steps = [LedgerStep(**s) for s in data.get("steps", [])]
        ledger.rows_quarantined = int(data["rows_quarantined"])
        return ledger
