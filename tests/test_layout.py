"""The house rules of the code layout (DEVELOPERS.md): rooms import only downward, modules stay readable.

Rooms of ``tasks/``, lowest first: ingest → train → evidence → apply → lifecycle → present. A module may import
its own room and the rooms below it, never one above; ``schemas/`` imports nothing of ``tasks/`` or ``flows/``;
``tasks/`` never imports ``flows/``. These are the project's own conventions (no outside source): the checks read
the source with ``ast``, so a lazy import inside a function counts as much as one at the top.
"""

from __future__ import annotations

import ast
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
ROOMS = ["ingest", "train", "evidence", "apply", "lifecycle", "present"]
MAX_LINES = 500
REASON_MARK = "Longer than 500 lines because"


def _imports(path: Path) -> list[tuple[int, str]]:
    found = []
    for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
        if isinstance(node, ast.ImportFrom) and node.module:
            found.append((node.lineno, node.module))
            found += [(node.lineno, f"{node.module}.{a.name}") for a in node.names]
        elif isinstance(node, ast.Import):
            found += [(node.lineno, a.name) for a in node.names]
    return [(line, name) for line, name in found if name.startswith("entivec")]


def _room(module: str) -> str | None:
    parts = module.split(".")
    if len(parts) >= 3 and parts[:2] == ["entivec", "tasks"] and parts[2] in ROOMS:
        return parts[2]
    return None


def _sources(folder: str) -> list[Path]:
    return sorted((ROOT / folder).rglob("*.py"))


def test_rooms_import_only_downward():
    upward = []
    for path in _sources("tasks"):
        here = path.relative_to(ROOT / "tasks").parts[0]
        if here not in ROOMS:
            continue
        for line, name in _imports(path):
            there = _room(name)
            if there is not None and ROOMS.index(there) > ROOMS.index(here):
                upward.append(f"{path.relative_to(ROOT)}:{line} imports {name} ({here} -> {there})")
            if name.startswith("entivec.flows") or name.startswith("entivec.cli"):
                upward.append(f"{path.relative_to(ROOT)}:{line} imports {name} (tasks -> {name})")
    assert upward == []


def test_every_task_module_lives_in_a_room():
    loose = [p.name for p in (ROOT / "tasks").glob("*.py") if p.name not in ("__init__.py", "lookup_model.py")]
    assert loose == [], "modules directly under tasks/ belong in a stage room"


def test_schemas_import_no_steps_or_flows():
    wrong = [
        f"{path.relative_to(ROOT)}:{line} imports {name}"
        for path in _sources("schemas")
        for line, name in _imports(path)
        if name.startswith(("entivec.tasks", "entivec.flows"))
    ]
    assert wrong == []


def test_long_modules_say_why():
    long = []
    for folder in ("tasks", "flows", "schemas", "src/entivec"):
        for path in _sources(folder):
            text = path.read_text(encoding="utf-8")
            lines = text.count("\n") + 1
            docstring = ast.get_docstring(ast.parse(text)) or ""
            if lines > MAX_LINES and REASON_MARK not in docstring:
                long.append(f"{path.relative_to(ROOT)} ({lines} lines)")
    assert long == [], f"modules over {MAX_LINES} lines need a sentence starting {REASON_MARK!r} in their docstring"


def test_a_broken_rule_is_seen(tmp_path):
    # The checker itself: an upward import written into a room module is found.
    sample = tmp_path / "m.py"
    sample.write_text("from entivec.tasks.present.report import page\n", encoding="utf-8")
    assert _room(_imports(sample)[0][1]) == "present"
    assert ROOMS.index("present") > ROOMS.index("ingest")
