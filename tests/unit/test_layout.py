"""studies/layout.py, the one home of the queue folder's layout: every path
the queue, the executors and ``collect`` use comes from StudyLayout, and the
paths are the ones the contract and the queue's documentation name
(/work/shared/design.md: "its runs live in ROOT/STUDY/"; studies/queue.py:
ROOT/queue.sqlite, ROOT/STUDY/RUN_ID.nc, .log, .ckpt, study.json).
"""
from __future__ import annotations

import re
from pathlib import Path

import pytest

from wavesweep.errors import JobError
from wavesweep.studies import layout as layout_module
from wavesweep.studies.layout import StudyLayout
from wavesweep.studies.queue import Queue
from wavesweep.study import expand_study

def test_every_path_of_a_queue_folder(tmp_path):
    lay = StudyLayout(tmp_path)
    assert lay.queue_db == tmp_path / "queue.sqlite"
    assert lay.reserve == tmp_path / ".disk-reserve"
    assert lay.study_dir("scan") == tmp_path / "scan"
    assert lay.manifest("scan") == tmp_path / "scan" / "study.json"
    assert lay.summary("scan") == tmp_path / "scan" / "summary.nc"
    assert lay.result("scan", "ab12") == tmp_path / "scan" / "ab12.nc"
    assert lay.log("scan", "ab12") == tmp_path / "scan" / "ab12.log"
    assert StudyLayout.log_in_progress(lay.log("scan", "ab12")) == tmp_path / "scan" / "ab12.log.part"
    assert lay.checkpoint("scan", "ab12") == tmp_path / "scan" / "ab12.ckpt"


def test_the_queue_and_its_claims_use_the_layout(tmp_path, free_job):
    raw = free_job             # submitted, never run
    raw["sweep"] = {"packet.width": [1.5, 2.0]}
    q = Queue(tmp_path)
    q.submit(expand_study(raw, name="scan"))
    lay = StudyLayout(tmp_path)
    assert q.path == lay.queue_db and q.path.is_file() and q.reserve_path == lay.reserve
    assert lay.manifest("scan").is_file() and lay.studies() == ["scan"]
    claim = q.claim("w1")
    rid = claim["run_id"]
    assert Path(claim["result"]) == lay.result("scan", rid) == q.result_path("scan", rid)
    assert Path(claim["log"]) == lay.log("scan", rid) == q.log_path("scan", rid)
    assert Path(claim["checkpoint"]) == lay.checkpoint("scan", rid) == q.checkpoint_path("scan", rid)


def test_study_names_that_cannot_name_a_folder_are_refused(tmp_path):
    for bad in ("", " ", "a/b", ".hidden", "queue.sqlite", "x" * 201):
        with pytest.raises(JobError, match="study"):
            StudyLayout.check_study_name(bad)
    assert StudyLayout.check_study_name("barrier-scan.v2") == "barrier-scan.v2"
    with pytest.raises(JobError, match="cannot name a folder of ROOT"):
        Queue(tmp_path).result_path("../elsewhere", "ab12")


def test_no_other_module_spells_the_layout():
    """One home: the file names of a queue folder are written out in
    studies/layout.py only (fails on the code before it had one, where
    queue.py, collect.py and the executors each spelled some)."""
    package = Path(layout_module.__file__).resolve().parents[1]
    names = re.compile(r"""["'](queue\.sqlite|study\.json|summary\.nc|\.disk-reserve)["']"""
                       r"""|\{run_id\}\.(nc|log|ckpt)|\.log\.part["']""")
    offenders = []
    for path in sorted((package / "studies").rglob("*.py")):
        if path.name == "layout.py":
            continue
        for number, line in enumerate(path.read_text().splitlines(), 1):
            if names.search(line):
                offenders.append(f"{path.relative_to(package)}:{number}: {line.strip()}")
    assert offenders == []
