"""What every folder-making task shares: progress reports and failure records.

The visits' stage tasks (``VisitTask``) and the programme's joint fit
(``JointDetrend``) report progress and record a failure for the command line
through the one implementation of ``tasks/foldertask.FolderTask``; these tests
hold the contract the command line reads (README "Errors and exit status":
status 2 for a user's mistake, 3 for the machine, 1 for a bug; one line that
names where the problem is).  Common practice for a command-line tool, no
outside reference.
"""

from types import SimpleNamespace

from lightledger.pipeline.errors import ParameterError
from lightledger.tasks import base, foldertask
from lightledger.tasks.joint import JointDetrend


def _joint(tmp_path):
    task = JointDetrend(programme=str(tmp_path / "prog.toml"), chains="[]", run_id="r1")
    task.__dict__["_config"] = SimpleNamespace(notebook=tmp_path)   # no programme file needed
    return task


def _record(tmp_path, task):
    return (tmp_path / ".failures" / "r1" / f"{task.task_id}.txt").read_text(encoding="utf-8")


def test_the_progress_reporter_is_one_for_every_folder_task(tmp_path, monkeypatch):
    assert base.PROGRESS is foldertask.PROGRESS        # the command line sets it through base
    seen = []
    monkeypatch.setitem(foldertask.PROGRESS, "callback", lambda *a: seen.append(a))
    _joint(tmp_path).progress(3, 8, "joint fit, visit1")
    assert seen == [("joint", "joint fit, visit1", 3, 8, None)]


def test_a_joint_failure_is_recorded_with_its_status_and_one_line(tmp_path):
    task = _joint(tmp_path)
    task.on_failure(ParameterError("planet.period: must be positive"))
    status, line = _record(tmp_path, task).splitlines()
    assert status == "2"
    assert line == (f"lightledger: error: {tmp_path / 'prog.toml'} (joint stage): "
                    "planet.period: must be positive")


def test_a_joint_bug_keeps_its_traceback(tmp_path):
    task = _joint(tmp_path)
    try:
        raise ZeroDivisionError("x")
    except ZeroDivisionError as exc:
        task.on_failure(exc)
    text = _record(tmp_path, task)
    assert text.startswith("1\nlightledger: internal error (a bug")
    assert "ZeroDivisionError" in text


def test_a_visit_stage_failure_names_the_visit_stage_chunk_and_task_family(tmp_path):
    from lightledger.tasks.extract import ExtractChunk

    task = ExtractChunk(visit=str(tmp_path / "v.toml"), chain="a:b:c", chunk=3, run_id="r1")
    task.__dict__["_plan"] = SimpleNamespace(
        visit=SimpleNamespace(notebook=tmp_path, path=tmp_path / "v.toml"))
    task.on_failure(ParameterError("order: must be >= 0"))
    assert _record(tmp_path, task).splitlines()[1] == (
        f"lightledger: error: {tmp_path / 'v.toml'} (extract stage, chunk 3): order: must be >= 0")
    try:
        raise ZeroDivisionError("x")
    except ZeroDivisionError as exc:
        task.on_failure(exc)
    assert _record(tmp_path, task).startswith(
        "1\nlightledger: ExtractChunk failed: internal error (a bug")
