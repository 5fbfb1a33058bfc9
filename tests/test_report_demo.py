"""``bayesbase demo`` in worker processes writes the same files, byte for byte, as in one
process (the report's clock fixed; a PDF's creation date and file id, which fpdf2 takes from
the clock, set aside), and prints the same lines. The cases are the case library's invented
patients."""
from __future__ import annotations

import argparse
import re
from datetime import datetime, timezone

import pytest

from bayesbase.cli import results as demo_cli
from bayesbase.report import content

_PDF_CLOCK = re.compile(rb"/CreationDate \([^)]*\)|/ID \[<[0-9A-F]+><[0-9A-F]+>\]")


class _FixedClock(datetime):
    @classmethod
    def now(cls, tz=None):
        return datetime(2026, 12, 3, 12, 0, tzinfo=timezone.utc)


def _demo(out, jobs: int, capsys) -> tuple[dict, str]:
    rc = demo_cli.cmd_demo(argparse.Namespace(out=str(out), no_pdf=False, jobs=jobs))
    assert rc == 0
    printed = capsys.readouterr().out.replace(str(out), "<out>")
    files = {}
    for p in sorted(out.iterdir()):
        data = p.read_bytes()
        files[p.name] = _PDF_CLOCK.sub(b"", data) if p.suffix == ".pdf" else data
    return files, printed


@pytest.mark.slow
def test_demo_in_workers_writes_what_one_process_writes(tmp_path, monkeypatch, capsys):
    monkeypatch.setattr(content, "datetime", _FixedClock)  # the workers are forked: they see it
    one, one_printed = _demo(tmp_path / "one", 1, capsys)
    two, two_printed = _demo(tmp_path / "two", 2, capsys)
    assert sorted(one) == sorted(two)
    assert {p.rsplit(".", 1)[1] for p in one} == {"json", "html", "pdf"}
    assert len(one) == 3 * len(one_printed.split("\n\n")[0].splitlines())
    for name in one:
        assert one[name] == two[name], name
    assert one_printed == two_printed


def test_demo_falls_back_to_one_process(tmp_path, monkeypatch):
    """Where no worker can be started the cases run in this process."""
    monkeypatch.setattr(demo_cli, "_demo_pool", lambda n: None)
    ran = []
    monkeypatch.setattr(demo_cli, "_demo_in_process",
                        lambda case, d, out, pdf: ran.append(case["id"]) or case["id"])
    todo = [({"id": "a"}, tmp_path), ({"id": "b"}, tmp_path)]
    assert demo_cli._demo_lines(todo, tmp_path, False, 2) == ["a", "b"]
    assert ran == ["a", "b"]


def test_demo_jobs_must_be_positive(tmp_path, capsys):
    rc = demo_cli.cmd_demo(argparse.Namespace(out=str(tmp_path), no_pdf=True, jobs=0))
    assert rc == 2 and "--jobs" in capsys.readouterr().err
