"""
A folder holds the outputs of one run (docs/outputs.md, "How outputs are written"): the set is
staged and moved in together, a second concurrent run is refused, stale files are cleaned.
"""

from __future__ import annotations

import json

import filelock
import pytest

from geosp.cli import main
from geosp.errors import InputError
from geosp.io.atomic import output_set
from tests.conftest import write_survey
from tests.test_robustness import FAST


def _old_set(out, names=("interpretation.gpkg", "map.html", "report.html", "run.json")):
    out.mkdir(parents=True, exist_ok=True)
    for name in names:
        (out / name).write_text(f"old {name}")


def test_new_set_replaces_the_old_one_and_stale_names_go(tmp_path):
    out = tmp_path / "out"
    _old_set(out)
    with output_set(out) as staging:
        (staging / "interpretation.gpkg").write_text("new")
        (staging / "run.json").write_text("{}")
    assert sorted(p.name for p in out.iterdir() if not p.name.startswith(".")) == ["interpretation.gpkg",
                                                                                    "run.json"]
    assert (out / "interpretation.gpkg").read_text() == "new"
    assert list((out / ".geosp").iterdir()) == []


def test_failure_while_writing_leaves_the_old_set_untouched(tmp_path):
    out = tmp_path / "out"
    _old_set(out)
    with pytest.raises(RuntimeError), output_set(out) as staging:
        (staging / "interpretation.gpkg").write_text("new")
        raise RuntimeError("publishing failed")
    assert all((out / n).read_text() == f"old {n}" for n in ("interpretation.gpkg", "map.html", "run.json"))
    assert not (out / ".geosp").exists()  # created by the failed run, so removed with it


def test_folder_created_by_a_failed_run_is_removed(tmp_path):
    out = tmp_path / "new" / "out"
    with pytest.raises(ValueError), output_set(out):
        raise ValueError("bad input")
    assert not out.exists()


def test_journal_left_by_a_hard_kill_is_completed_first(tmp_path):
    """The state a kill during the move leaves: some files moved, the rest still staged."""
    out = tmp_path / "out"
    _old_set(out)
    staging = out / ".geosp" / "staging-dead0001"
    staging.mkdir(parents=True)
    (out / "interpretation.gpkg").write_text("new")  # already moved
    (staging / "run.json").write_text("new run")  # not yet
    plan = {"staging": staging.name, "new": ["interpretation.gpkg", "run.json"], "remove": ["map.html"]}
    (out / ".geosp" / "swap.json").write_text(json.dumps(plan))
    said = []
    with output_set(out, say=said.append) as fresh:
        # Inside the next run the folder already holds the interrupted run's whole set.
        assert (out / "run.json").read_text() == "new run"
        assert not (out / "map.html").exists()
        assert (out / "report.html").read_text() == "old report.html"  # not in the plan: untouched
        (fresh / "run.json").write_text("third")
    assert "interrupted run" in said[0]
    assert not staging.exists()


def test_stale_temporary_files_are_removed(tmp_path):
    out = tmp_path / "out"
    _old_set(out)
    (out / ".interpretation.tmp-1a2b3c4d.gpkg").write_text("half")
    (out / ".geosp").mkdir()
    (out / ".geosp" / "staging-0badf00d").mkdir()
    (out / ".geosp" / "staging-0badf00d" / "map.html").write_text("half")
    (out / ".geosp" / ".state.json-x.tmp").write_text("half")
    with output_set(out) as staging:
        (staging / "run.json").write_text("{}")
    assert sorted(p.name for p in out.iterdir()) == [".geosp", "run.json"]
    assert list((out / ".geosp").iterdir()) == []


def test_second_writer_is_refused(tmp_path):
    out = tmp_path / "out"
    with output_set(out):
        with pytest.raises(InputError, match="another geosp run is writing"), output_set(out):
            pass


@pytest.mark.slow
def test_concurrent_run_into_the_same_folder_exits_2(tmp_path, capsys):
    project = write_survey(tmp_path / "s", "shp", extra_project=FAST)
    out = tmp_path / "out"
    (out / ".geosp").mkdir(parents=True)
    with filelock.FileLock(out / ".geosp" / "lock", timeout=0):  # what a running geosp holds
        code = main(["run", str(project), "--out", str(out)])
    err = capsys.readouterr().err
    assert code == 2
    assert "another geosp run is writing into this folder" in err
    assert main(["run", str(project), "--out", str(out), "--quiet"]) == 0


@pytest.mark.slow
def test_single_stage_command_leaves_no_output_of_an_earlier_run(tmp_path):
    project = write_survey(tmp_path / "s", "shp", extra_project=FAST.replace("map = false", "map = true"))
    out = tmp_path / "out"
    assert main(["run", str(project), "--out", str(out), "--quiet"]) == 0
    assert (out / "map.html").exists()
    assert main(["detect", str(project), "--out", str(out), "--quiet"]) == 0
    assert not (out / "map.html").exists()  # it showed the earlier run's sources
    listed = json.loads((out / "run.json").read_text())["outputs"]
    on_disk = {p.name for p in out.iterdir() if not p.name.startswith(".")} - {"run.json"}
    assert set(listed) == on_disk
