"""Progress lines: one per finished stage with time and rate on standard error; nothing when quiet."""

from __future__ import annotations

import re

from entivec import progress


def test_stage_line_has_time_rows_and_rate(capsys, monkeypatch):
    monkeypatch.setenv(progress.LEVEL_VARIABLE, "normal")
    with progress.stage("ingest") as s:
        s.add(1_500)
        s.add(500)
        s.note("2 files")
    out, err = capsys.readouterr()
    assert out == ""
    assert re.search(r"ingest\s+\d+\.\d s\s+2,000 rows\s+[\d,.]+ rows/s\s+\(2 files\)", err), err


def test_quiet_prints_nothing_and_a_failing_stage_prints_no_line(capsys, monkeypatch):
    monkeypatch.setenv(progress.LEVEL_VARIABLE, "quiet")
    with progress.stage("ingest") as s:
        s.add(10)
    progress.note("hello")
    monkeypatch.setenv(progress.LEVEL_VARIABLE, "normal")
    try:
        with progress.stage("validate"):
            raise ValueError("bad row")
    except ValueError:
        pass
    assert capsys.readouterr().err == ""


def test_bar_off_a_terminal_is_silent(capsys):
    with progress.bar("epoch 1", total=10) as b:
        b.advance(3)
        b.update(completed=10, status="done")
    assert capsys.readouterr().err == ""


def test_begin_and_end_print_one_line_and_nothing_when_quiet(capsys, monkeypatch):
    monkeypatch.setenv(progress.LEVEL_VARIABLE, "normal")
    shown = progress.begin("read")
    shown.end(3_000, "2 files")
    out, err = capsys.readouterr()
    assert out == "" and re.search(r"read\s+\d+\.\d s\s+3,000 rows\s+[\d,.]+ rows/s\s+\(2 files\)", err), err
    monkeypatch.setenv(progress.LEVEL_VARIABLE, "quiet")
    progress.begin("read").end(3_000)
    assert capsys.readouterr() == ("", "")
