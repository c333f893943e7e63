"""Where audit, score and preview write their reports, and what they may replace there
(augsplit.report_folder): a user's file of a report's name, the command's own input, and a
folder inside a dataset (its images) are refused by name and left as they were; a folder's
earlier reports are replaced; a dataset's own report folders stay augsplit's. Each case was
seen to replace or add a file before the fix."""

from __future__ import annotations

import pandas as pd
import pytest
from specs import lanes_dataset

from augsplit.cli import main
from augsplit.dataset import read_manifest
from augsplit.errors import DatasetError
from augsplit.report_folder import REPORTS_LIST, ReportFolder


@pytest.fixture(scope="module")
def dataset(tmp_path_factory):
    return lanes_dataset(tmp_path_factory.mktemp("ds") / "data", per_class=4, store="files")


@pytest.fixture
def predictions(dataset, tmp_path):
    m = read_manifest(dataset)
    p = tmp_path / "pred.csv"
    pd.DataFrame({"image_id": m["image_id"], "predicted": m["class_name"]}).to_csv(p, index=False)
    return p


def cli(*args) -> int:
    return main([str(a) for a in args])


def commands(dataset, predictions, out):
    return {"score": ("score", dataset, predictions, "--out", out), "audit": ("audit", dataset, "--out", out),
            "preview": ("preview", dataset, "--out", out)}


USER_FILE = {"score": "report.html", "audit": "audit.html", "preview": "coverage.png"}


@pytest.mark.parametrize("command", ["score", "audit", "preview"])
def test_a_user_file_of_a_report_name_is_refused_and_kept(dataset, predictions, tmp_path, capsys, command):
    out = tmp_path / "mine"
    out.mkdir()
    (out / USER_FILE[command]).write_text("my notes")
    assert cli(*commands(dataset, predictions, out)[command]) == 2
    err = capsys.readouterr().err
    assert "has no record of writing it here" in err and USER_FILE[command] in err
    assert (out / USER_FILE[command]).read_text() == "my notes"
    assert sorted(p.name for p in out.iterdir()) == [USER_FILE[command]]  # nothing else written either


@pytest.mark.parametrize("command", ["score", "audit", "preview"])
def test_reports_are_replaced_by_a_rerun(dataset, predictions, tmp_path, command):
    out = tmp_path / "reports"
    for _ in range(2):
        assert cli(*commands(dataset, predictions, out)[command]) in (0, 1)
    assert (out / REPORTS_LIST).is_file() and (out / USER_FILE[command]).stat().st_size > 100


@pytest.mark.parametrize("name", ["by_split.csv", "other_gaps.csv", "comparison.csv"])
def test_score_refuses_a_user_file_of_a_table_name_before_any_scoring(dataset, predictions, tmp_path, capsys,
                                                                      monkeypatch, name):
    import augsplit.score.run as run

    out = tmp_path / "mine"
    out.mkdir()
    (out / name).write_text("my table")
    other = tmp_path / "other.csv"
    other.write_bytes(predictions.read_bytes())
    # was: the predictions were read and scored, and only writing the tables was refused
    monkeypatch.setattr(run, "load_predictions", lambda *a, **k: pytest.fail("scored before the folder was judged"))
    compare = [] if name == "by_split.csv" else ["--compare", other]
    assert cli("score", dataset, predictions, "--out", out, *compare) == 2
    err = capsys.readouterr().err
    assert "has no record of writing it here" in err and name in err
    assert sorted(p.name for p in out.iterdir()) == [name] and (out / name).read_text() == "my table"


def test_score_never_replaces_its_predictions_file(dataset, predictions, tmp_path, capsys):
    out = tmp_path / "u"
    out.mkdir()
    (out / "per_image.csv").write_bytes(predictions.read_bytes())
    assert cli("score", dataset, out / "per_image.csv", "--out", out) == 2
    assert "is an input of this command" in capsys.readouterr().err
    assert (out / "per_image.csv").read_bytes() == predictions.read_bytes()


def test_audit_never_replaces_its_input(dataset, tmp_path, capsys):
    out = tmp_path / "a"
    out.mkdir()
    table = read_manifest(dataset)
    table.to_csv(out / "audit.json", index=False)  # an odd name for a table, but the user's file
    before = (out / "audit.json").read_bytes()
    assert cli("audit", out / "audit.json", "--out", out) == 2
    assert "is an input of this command" in capsys.readouterr().err
    assert (out / "audit.json").read_bytes() == before


@pytest.mark.parametrize("command", ["score", "audit", "preview"])
def test_reports_inside_a_dataset_go_only_to_its_report_folders(dataset, predictions, capsys, command):
    inside = dataset / "images" / "train"
    before = sorted(p.name for p in inside.iterdir())
    assert cli(*commands(dataset, predictions, inside)[command]) == 2
    assert "lies inside the dataset folder" in capsys.readouterr().err
    assert sorted(p.name for p in inside.iterdir()) == before
    assert cli("verify", dataset, "--quiet") == 0
    own = dataset / {"score": "score", "audit": "audit", "preview": "preview"}[command]
    assert cli(*commands(dataset, predictions, own)[command]) in (0, 1)  # the dataset's own report folder
    assert cli(*commands(dataset, predictions, own)[command]) in (0, 1)  # again: its files are augsplit's
    assert (own / REPORTS_LIST).is_file()  # each command's last run is recorded: what it may remove next time
    assert cli("verify", dataset, "--quiet") == 0


def test_preview_of_a_damaged_dataset_writes_no_sheet(dataset, tmp_path, capsys):
    import shutil

    broken = tmp_path / "broken"
    shutil.copytree(dataset, broken)
    m = read_manifest(broken)
    last = m[m["split"] == "test"]["file"].iloc[-1]
    (broken / last).unlink()  # a picked image of the second split's sheet
    out = tmp_path / "pv"
    assert cli("preview", broken, "--out", out) == 2
    assert "Traceback" not in capsys.readouterr().err
    assert not out.exists() or not any(p.suffix == ".png" for p in out.iterdir())


def test_preview_refuses_a_stored_image_changed_since_it_was_made(dataset, tmp_path, capsys):
    import shutil

    import cv2

    changed = tmp_path / "changed"
    shutil.copytree(dataset, changed)
    m = read_manifest(changed)
    last = changed / m[m["split"] == "test"]["file"].iloc[-1]
    img = cv2.imread(str(last), cv2.IMREAD_UNCHANGED)
    cv2.imwrite(str(last), 255 - img)  # still a valid PNG of the canvas, but not the image its row describes
    out = tmp_path / "pv"
    assert cli("preview", changed, "--out", out) == 2  # was 0: the sheet showed it under its row's caption
    err = capsys.readouterr().err
    assert "does not match its checksum" in err and m[m["split"] == "test"]["image_id"].iloc[-1] in err
    assert not out.exists() or not any(p.suffix == ".png" for p in out.iterdir())
    assert cli("preview", dataset, "--out", out) == 0  # the untouched dataset's sheets


# ---- the API's predictions pass the file's checks -------------------------------------------------


def _frames(m):
    names = sorted(m["class_name"].unique())
    return {
        "scores all NaN": pd.DataFrame({"image_id": m["image_id"], **{f"score_{n}": float("nan") for n in names}}),
        "fractional index": pd.DataFrame({"image_id": m["image_id"], "predicted_index": m["class_index"] + 0.9}),
        "no image_id": pd.DataFrame({"predicted": m["class_name"]}),
        "probabilities not summing to one": pd.DataFrame({"image_id": m["image_id"],
                                                          **{f"prob_{n}": 0.9 for n in names}}),
    }


@pytest.mark.parametrize("case", ["scores all NaN", "fractional index", "no image_id",
                                  "probabilities not summing to one"])
def test_score_predictions_checks_a_dataframe_as_it_checks_a_file(dataset, tmp_path, case):
    import augsplit

    df = _frames(read_manifest(dataset))[case]
    with pytest.raises(augsplit.AugsplitError) as dataframe_error:
        augsplit.score_predictions(dataset, df)  # all-NaN scores gave a top-2 accuracy of 1.0; 1.9 was read as 1
    df.to_csv(tmp_path / "p.csv", index=False)
    with pytest.raises(augsplit.AugsplitError) as file_error:
        augsplit.score_predictions(dataset, tmp_path / "p.csv")
    assert dataframe_error.value.message == file_error.value.message


@pytest.mark.parametrize("command", ["audit", "score"])
def test_a_report_folder_from_before_the_list_is_taken_as_augsplit_s(dataset, predictions, tmp_path, command):
    out = tmp_path / "old"
    assert cli(*commands(dataset, predictions, out)[command]) in (0, 1)
    (out / REPORTS_LIST).unlink()  # as an earlier augsplit left it: its reports, no list
    assert cli(*commands(dataset, predictions, out)[command]) in (0, 1)  # was refused: 'did not write it here'
    (out / REPORTS_LIST).unlink()
    (out / f"{command}.json").write_text("{}")  # a JSON augsplit's reports never are: nothing is taken for ours
    assert cli(*commands(dataset, predictions, out)[command]) == 2


def test_a_run_cut_short_leaves_files_a_later_run_replaces(dataset, tmp_path, monkeypatch):
    import augsplit.audit.report as report

    def broken(result):
        raise OSError("disk full")

    out = tmp_path / "cut"
    monkeypatch.setattr(report, "html_text", broken)
    with pytest.raises(OSError):
        report.write_reports(report.AuditResult((), (), (), {}, {}), out)
    assert (out / "audit.json").is_file() and not (out / "audit.html").exists()
    monkeypatch.undo()
    assert cli("audit", dataset, "--out", out) in (0, 1)  # audit.json was listed before it was written


def test_a_user_spec_named_spec_json_does_not_make_its_folder_a_dataset(dataset, tmp_path, monkeypatch):
    from augsplit.dataset.layout import is_dataset

    (tmp_path / "spec.json").write_text('{"seed": 1}')  # JSON is YAML: a user's spec may be named so
    assert not is_dataset(tmp_path) and is_dataset(dataset)
    assert cli("audit", dataset, "--out", tmp_path / "reports") in (0, 1)  # was 'lies inside the dataset folder'


def test_dataset_filters_take_any_collection(dataset):
    from augsplit import Dataset

    assert len(Dataset(dataset, "train", classes=range(2))) == len(Dataset(dataset, "train", classes=[0, 1]))
    assert len(Dataset(dataset, "train", cells=range(100))) == len(Dataset(dataset, "train"))


def test_an_audited_table_with_empty_image_bytes_cells_is_one_line(tmp_path, capsys):
    # a table whose image_bytes cells are empty (a manifest saved as CSV): was a TypeError traceback
    (tmp_path / "t.csv").write_text("image_id,x,split,image_bytes\na,5,train,\nb,55,test,\n")
    assert cli("audit", tmp_path / "t.csv", "--axis", "x=0:64", "--out", tmp_path / "au") == 2
    err = capsys.readouterr().err
    assert "neither image bytes nor an image file" in err and "Traceback" not in err


# ---- one run's report per command: what an earlier run wrote and this one did not is removed ----


def _csvs(folder):
    return sorted(p.name for p in folder.glob("*.csv"))


@pytest.mark.parametrize("where", ["outside", "own"])
def test_a_score_of_one_model_leaves_no_comparison_table_of_an_earlier_run(dataset, predictions, tmp_path, where):
    out = tmp_path / "reports" if where == "outside" else dataset / "score"
    other = tmp_path / "other.csv"
    other.write_bytes(predictions.read_bytes())
    single = tmp_path / "single"
    assert cli("score", dataset, predictions, "--out", single) in (0, 1)  # the tables of one model, for reference
    assert cli("score", dataset, predictions, "--compare", other, "--out", out) in (0, 1)
    assert "comparison.csv" in _csvs(out) and _csvs(out) != _csvs(single)
    out.mkdir(exist_ok=True)
    (out / "notes.csv").write_text("mine")  # the user's, beside the reports: never augsplit's to remove
    if where == "outside":
        assert cli("audit", dataset, "--out", out) in (0, 1)  # another command's reports in the same folder
    assert cli("score", dataset, predictions, "--out", out) in (0, 1)
    # before: the earlier run's comparison.csv and per-model tables stayed beside the new tables
    assert _csvs(out) == sorted(_csvs(single) + ["notes.csv"])
    assert (out / "notes.csv").read_text() == "mine"
    assert where == "own" or (out / "audit.json").is_file() and (out / "audit.html").is_file()
    (out / "notes.csv").unlink()
    assert cli("verify", dataset, "--quiet") == 0


def test_a_stale_report_that_became_a_link_a_folder_or_an_input_is_left(dataset, predictions, tmp_path):
    out, other = tmp_path / "reports", tmp_path / "other.csv"
    other.write_bytes(predictions.read_bytes())
    assert cli("score", dataset, predictions, "--compare", other, "--out", out) in (0, 1)
    stale = [n for n in _csvs(out) if n not in _csvs_of_one_model(dataset, predictions, tmp_path)]
    assert len(stale) >= 3
    outside = tmp_path / "outside.txt"
    outside.write_text("not augsplit's")
    link, folder, used = stale[0], stale[1], stale[2]
    (out / link).unlink()
    (out / link).symlink_to(outside)
    (out / folder).unlink()
    (out / folder).mkdir()
    (out / folder / "inside.txt").write_text("kept")
    (out / used).write_bytes(predictions.read_bytes())  # now this run's predictions file
    assert cli("score", dataset, out / used, "--out", out) in (0, 1)
    assert (out / link).is_symlink() and outside.read_text() == "not augsplit's"
    assert (out / folder / "inside.txt").read_text() == "kept"
    assert (out / used).read_bytes() == predictions.read_bytes()
    assert not any((out / n).exists() for n in stale[3:])  # the rest of the earlier run's tables went


def _csvs_of_one_model(dataset, predictions, tmp_path):
    out = tmp_path / "one-model"
    if not out.exists():
        assert cli("score", dataset, predictions, "--out", out) in (0, 1)
    return _csvs(out)


def test_report_sets_remove_only_what_a_completed_run_of_the_command_left(tmp_path):
    from augsplit.report_folder import report_set

    out = tmp_path / "r"
    with report_set(out, "score", ["a.csv", "b.csv"]) as f:
        for n in ("a.csv", "b.csv"):
            f.write(n, n)
    with report_set(out, "audit", ["audit.json"]) as f:
        f.write("audit.json", "{}")
    with pytest.raises(RuntimeError):  # a run that fails removes nothing
        with report_set(out, "score", ["a.csv", "c.csv"]) as f:
            f.write("c.csv", "c")
            raise RuntimeError("cut short")
    assert sorted(p.name for p in out.iterdir() if p.name != REPORTS_LIST) == ["a.csv", "audit.json", "b.csv", "c.csv"]
    (out / "a.csv").write_text("mine now")  # the failed run did not write a.csv: the user may have since
    with pytest.raises(DatasetError, match="changed since augsplit wrote it"):
        with report_set(out, "score", ["a.csv"]):
            pass
    (out / "a.csv").unlink()
    with report_set(out, "score", ["a.csv"]) as f:
        f.write("a.csv", "again")
    # b.csv of the last completed run and c.csv of the run cut short (stamped as it failed) are
    # gone; audit's report is another command's
    assert sorted(p.name for p in out.iterdir() if p.name != REPORTS_LIST) == ["a.csv", "audit.json"]
    with report_set(out, "preview", ["a.csv"]):  # preview never wrote b.csv: a file of that name now is not its
        (out / "b.csv").write_text("user")
    with report_set(out, "score", ["a.csv"]):
        pass
    assert (out / "b.csv").read_text() == "user"
    import json

    import hashlib

    data = (out / "b.csv").read_bytes()  # a list naming b.csv for score, stamped as it is, but not among the files written
    doc = json.loads((out / REPORTS_LIST).read_text())
    doc["runs"]["score"].append("b.csv")
    doc["stamps"]["b.csv"] = [len(data), hashlib.sha256(data).hexdigest()]
    (out / REPORTS_LIST).write_text(json.dumps(doc))
    with report_set(out, "score", ["a.csv"]):
        pass
    assert (out / "b.csv").read_text() == "user"


def test_a_copied_report_folder_is_still_augsplit_s(tmp_path):
    import os
    import shutil

    from augsplit.report_folder import report_set

    first, copy = tmp_path / "first", tmp_path / "copy"
    with report_set(first, "score", ["x.csv", "y.csv"]) as f:
        for n in ("x.csv", "y.csv"):
            f.write(n, n)
    shutil.copytree(first, copy, copy_function=shutil.copy)  # new files: other inodes and times, same content
    for n in ("x.csv", "y.csv"):
        os.utime(copy / n, ns=(1, 1))
    with report_set(copy, "score", ["x.csv"]) as f:  # was refused as changed (stamps of inode and time)
        f.write("x.csv", "new")
    assert sorted(p.name for p in copy.iterdir() if p.name != REPORTS_LIST) == ["x.csv"]


def test_a_run_cut_short_still_lets_the_next_run_remove_the_last_complete_run_s_tables(dataset, predictions,
                                                                                     tmp_path, monkeypatch, capsys):
    out, other = _two_model_folder(dataset, predictions, tmp_path)
    two_models = set(_csvs(out))
    calls = []
    real = ReportFolder.write

    def cut(self, name, data):
        calls.append(name)
        if len(calls) == 3:
            raise KeyboardInterrupt
        return real(self, name, data)

    monkeypatch.setattr(ReportFolder, "write", cut)
    assert cli("score", dataset, predictions, "--compare", other, "--out", out) not in (0, 1)  # Ctrl-C, 2 files in
    assert len(calls) == 3
    monkeypatch.undo()
    (out / "comparison.csv").write_text("mine")  # saved by the user after the run was cut short
    assert cli("score", dataset, predictions, "--compare", other, "--out", out) == 2  # not written over
    assert "changed since augsplit wrote it" in capsys.readouterr().err
    assert (out / "comparison.csv").read_text() == "mine"
    assert cli("score", dataset, predictions, "--out", out) in (0, 1)
    # was: every table of the two-model run stayed, no longer any run's to remove
    assert set(_csvs(out)) == set(_csvs_of_one_model(dataset, predictions, tmp_path)) | {"comparison.csv"}
    assert len(two_models) > 10


def test_a_name_a_run_cut_short_never_wrote_stays_the_user_s(dataset, tmp_path, monkeypatch, capsys):
    import augsplit.preview as pv

    out, calls, real = tmp_path / "pv", [], pv.contact_sheet

    def cut(*args):
        calls.append(args)
        if len(calls) == 2:
            raise KeyboardInterrupt
        return real(*args)

    monkeypatch.setattr(pv, "contact_sheet", cut)
    assert cli("preview", dataset, "--out", out) not in (0, 1)  # Ctrl-C before coverage.png was written
    monkeypatch.undo()
    (out / "coverage.png").write_text("the user's")
    assert cli("preview", dataset, "--out", out) == 2  # was 0: written over, as a name listed before the run
    assert "has no record of writing it here" in capsys.readouterr().err
    assert (out / "coverage.png").read_text() == "the user's"


def test_a_user_s_file_between_two_runs_cut_short_is_not_adopted(dataset, predictions, tmp_path, monkeypatch):
    out, other = tmp_path / "r", tmp_path / "other.csv"
    other.write_bytes(predictions.read_bytes())
    real = ReportFolder.write

    def cut(self, name, data):
        if name == "comparison.csv":
            raise KeyboardInterrupt
        return real(self, name, data)

    monkeypatch.setattr(ReportFolder, "write", cut)
    assert cli("score", dataset, predictions, "--compare", other, "--out", out) not in (0, 1)
    (out / "comparison.csv").write_text("my own comparison")
    assert cli("score", dataset, predictions, "--compare", other, "--out", out) == 2  # not written over
    monkeypatch.undo()
    assert cli("score", dataset, predictions, "--out", out) in (0, 1)
    assert (out / "comparison.csv").read_text() == "my own comparison"  # was: stamped as it was, then removed


def test_preview_refuses_a_user_s_sheet_before_reading_any_image(dataset, tmp_path, capsys, monkeypatch):
    import augsplit.preview as pv

    out = tmp_path / "pv"
    out.mkdir()
    (out / "contact_train.png").write_text("the user's")
    monkeypatch.setattr(pv, "image_of", lambda *a, **k: pytest.fail("read an image before judging the folder"))
    assert cli("preview", dataset, "--out", out) == 2
    assert "has no record of writing it here" in capsys.readouterr().err
    assert (out / "contact_train.png").read_text() == "the user's"


def test_a_folder_from_before_the_list_keeps_its_reports_when_another_command_writes_first(dataset, predictions,
                                                                                         tmp_path):
    out = tmp_path / "old"
    assert cli("score", dataset, predictions, "--out", out) in (0, 1)
    (out / REPORTS_LIST).unlink()  # as an earlier augsplit left its score report: no list
    assert cli("audit", dataset, "--out", out) in (0, 1)
    assert cli("score", dataset, predictions, "--out", out) in (0, 1)  # was: score.json 'no record of writing it'


def test_a_report_folder_swapped_for_a_link_mid_run_is_no_traceback(dataset, predictions, tmp_path, monkeypatch,
                                                                    capsys):
    out, other = _two_model_folder(dataset, predictions, tmp_path)
    elsewhere = tmp_path / "elsewhere"
    elsewhere.mkdir()
    (elsewhere / "comparison.csv").write_text("not augsplit's")
    calls = []
    real = ReportFolder.write

    def swap(self, name, data):
        calls.append(name)
        if len(calls) == 3:
            out.rename(tmp_path / "moved")
            out.symlink_to(elsewhere)
        return real(self, name, data)

    monkeypatch.setattr(ReportFolder, "write", swap)
    assert cli("score", dataset, predictions, "--out", out) in (0, 1)  # was a NotADirectoryError traceback
    assert "Traceback" not in capsys.readouterr().err
    # the reports, the clean-up and the list stay in the folder that was checked, never in the link's target
    assert sorted(p.name for p in elsewhere.iterdir()) == ["comparison.csv"]  # was: the run's later reports too
    assert (elsewhere / "comparison.csv").read_text() == "not augsplit's"
    assert not (tmp_path / "moved" / "comparison.csv").exists()
    assert {"score.json", "report.html", REPORTS_LIST} <= {p.name for p in (tmp_path / "moved").iterdir()}


def test_a_full_disk_writing_the_list_is_one_line_and_keeps_the_old_list(dataset, predictions, tmp_path, monkeypatch,
                                                                          capsys):
    import errno
    import os

    import augsplit.report_folder as rf

    out = tmp_path / "r"
    assert cli("score", dataset, predictions, "--out", out) in (0, 1)
    before = (out / REPORTS_LIST).read_bytes()
    real = os.replace

    def full(src, dst, *args, **kwargs):
        if dst == REPORTS_LIST:
            raise OSError(errno.ENOSPC, "No space left on device")
        return real(src, dst, *args, **kwargs)

    monkeypatch.setattr(rf.os, "replace", full)
    assert cli("score", dataset, predictions, "--out", out) == 2
    err = capsys.readouterr().err
    assert "disk full" in err and REPORTS_LIST in err and len(err.strip().splitlines()) == 1
    monkeypatch.undo()
    assert (out / REPORTS_LIST).read_bytes() == before  # whole, as it was
    assert not [p for p in out.iterdir() if ".tmp-" in p.name]  # its temporary went


def test_preview_refuses_a_damaged_list_before_reading_any_image(dataset, tmp_path, capsys, monkeypatch):
    import augsplit.preview as pv

    out = tmp_path / "pv"
    out.mkdir()
    (out / REPORTS_LIST).write_text("[]")
    monkeypatch.setattr(pv, "image_of", lambda *a, **k: pytest.fail("read an image before judging the folder"))
    assert cli("preview", dataset, "--out", out) == 2
    assert "unreadable list" in capsys.readouterr().err


def _two_model_folder(dataset, predictions, tmp_path):
    out, other = tmp_path / "reports", tmp_path / "other.csv"
    other.write_bytes(predictions.read_bytes())
    assert cli("score", dataset, predictions, "--compare", other, "--out", out) in (0, 1)
    return out, other


def test_a_file_saved_under_a_stale_report_s_name_is_neither_removed_nor_replaced(dataset, predictions, tmp_path,
                                                                                  capsys):
    out, other = _two_model_folder(dataset, predictions, tmp_path)
    (out / "comparison.csv").unlink()
    (out / "comparison.csv").write_text("my own comparison")  # the user's, under a name augsplit wrote
    (out / "pred_per_image.csv").write_text("edited by hand")
    # a run that would replace them refuses by name: they are not the files augsplit wrote
    assert cli("score", dataset, predictions, "--compare", other, "--out", out) == 2
    assert "was changed since augsplit wrote it" in capsys.readouterr().err
    # a run that would remove them as stale leaves them (was: both removed)
    assert cli("score", dataset, predictions, "--out", out) in (0, 1)
    assert (out / "comparison.csv").read_text() == "my own comparison"
    assert (out / "pred_per_image.csv").read_text() == "edited by hand"
    assert not (out / "other_per_image.csv").exists()  # the untouched stale tables went
    assert cli("score", dataset, predictions, "--out", out) in (0, 1)  # and they stay on later runs
    assert (out / "comparison.csv").read_text() == "my own comparison"


def test_a_list_from_before_runs_were_recorded_removes_nothing(tmp_path):
    import json

    from augsplit.report_folder import report_set

    out = tmp_path / "r"
    out.mkdir()
    for n in ("score.json", "old.csv"):
        (out / n).write_text("{}")
    (out / REPORTS_LIST).write_text(json.dumps({"files": ["score.json", "old.csv"]}))  # as the last release wrote it
    with report_set(out, "score", ["score.json"]) as f:
        f.write("score.json", "{}")
    with report_set(out, "score", ["score.json"]):
        pass
    assert (out / "old.csv").is_file()


HOSTILE_LISTS = {  # each was read by str() of whatever it held: the first four removed the user's files named
    "a string for names": '{"files": [], "runs": {"score": "abc"}}',
    "null, true and 1 for names": '{"files": [], "runs": {"score": [null, true, 1]}}',
    "an object for names": '{"files": [], "runs": {"score": {"a": 1}}}',
    "a stamp of two numbers": '{"files": ["notes.txt"], "runs": {"score": ["notes.txt"]}, '
                              '"stamps": {"notes.txt": [1, 2]}}',
    "a NUL in a name": '{"files": ["a\\u0000b"], "runs": {"score": ["a\\u0000b"]}}',  # was a traceback
    "a lone surrogate": '{"files": ["\\ud800"], "runs": {"score": ["\\ud800"]}}',  # was a traceback
    "deep nesting": '{"files": ' + "[" * 100000 + "]" * 100000 + "}",  # was a RecursionError traceback
    "a path for a name": '{"files": ["../x"], "runs": {}}',
    "a command augsplit has not": '{"files": [], "runs": {"rm": []}}',
    "not an object": "[]",
}


@pytest.mark.parametrize("case", sorted(HOSTILE_LISTS))
def test_a_damaged_list_is_one_line_and_removes_nothing(dataset, predictions, tmp_path, capsys, case):
    out = tmp_path / "r"
    out.mkdir()
    mine = ["a", "b", "c", "None", "True", "1", "notes.txt"]
    for n in mine:
        (out / n).write_text("mine")
    (out / REPORTS_LIST).write_text(HOSTILE_LISTS[case])
    assert cli("score", dataset, predictions, "--out", out) == 2
    err = capsys.readouterr().err
    assert "unreadable list of the reports augsplit wrote here" in err and "Traceback" not in err
    assert len(err.strip().splitlines()) == 1
    assert sorted(p.name for p in out.iterdir()) == sorted(mine + [REPORTS_LIST])
    assert all((out / n).read_text() == "mine" for n in mine)


@pytest.mark.parametrize("command", ["score", "audit", "preview"])
def test_a_second_run_writing_reports_in_the_same_folder_is_refused(dataset, predictions, tmp_path, capsys, command):
    import fcntl
    import os

    out = tmp_path / "busy"
    assert cli(*commands(dataset, predictions, out)[command]) in (0, 1)
    before = {p.name: p.read_bytes() for p in out.iterdir()}
    fd = os.open(out, os.O_RDONLY | os.O_DIRECTORY)
    try:
        fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)  # as a run writing reports there now holds it
        assert cli(*commands(dataset, predictions, out)[command]) == 2  # was 0 or 1: both runs wrote the list
        err = capsys.readouterr().err.strip()
        assert "another augsplit run is writing reports in this folder" in err and len(err.splitlines()) == 1
    finally:
        os.close(fd)
    assert {p.name: p.read_bytes() for p in out.iterdir()} == before
    assert cli(*commands(dataset, predictions, out)[command]) in (0, 1)  # the lock went with the other run


def test_a_busy_report_folder_is_refused_before_the_work(dataset, tmp_path, monkeypatch, capsys):
    import fcntl
    import os

    import augsplit.preview as pv

    out = tmp_path / "busy"
    out.mkdir()
    fd = os.open(out, os.O_RDONLY | os.O_DIRECTORY)
    try:
        fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        monkeypatch.setattr(pv, "image_of", lambda *a, **k: pytest.fail("read an image in a busy report folder"))
        assert cli("preview", dataset, "--out", out) == 2  # was: every image read, then refused
        assert "another augsplit run is writing reports" in capsys.readouterr().err
    finally:
        os.close(fd)


def test_reports_go_to_the_folder_checked_not_a_link_swapped_in_mid_run(dataset, tmp_path):
    import augsplit.preview as pv

    out, moved, elsewhere = tmp_path / "pv", tmp_path / "pv-moved", tmp_path / "elsewhere"
    elsewhere.mkdir()
    real, calls = pv.contact_sheet, []

    def swap(*args):
        if not calls:  # the folder checked and in use, then swapped for a link to another folder
            out.rename(moved)
            out.symlink_to(elsewhere, target_is_directory=True)
        calls.append(args)
        return real(*args)

    mp = pytest.MonkeyPatch()
    mp.setattr(pv, "contact_sheet", swap)
    try:
        assert cli("preview", dataset, "--out", out) == 0
    finally:
        mp.undo()
    assert list(elsewhere.iterdir()) == []  # was: every sheet after the swap, and coverage.png, written there
    assert {p.name for p in moved.iterdir()} == {"contact_train.png", "contact_test.png", "coverage.png", REPORTS_LIST}


def test_a_report_folder_writes_only_its_run_s_names(tmp_path):
    from augsplit.report_folder import report_set

    with report_set(tmp_path / "r", "audit", ["audit.json"]) as out:
        assert out.write("audit.json", "{}") == tmp_path / "r" / "audit.json"
        with pytest.raises(ValueError):
            out.write("../escape.json", "{}")
    assert not (tmp_path / "escape.json").exists()


def test_a_link_put_at_a_report_s_name_while_it_is_written_is_kept(tmp_path, monkeypatch):
    import os

    from augsplit.report_folder import report_set

    out, target = tmp_path / "r", tmp_path / "target.txt"
    target.write_text("the user's")
    real_fsync = os.fsync

    def fsync(fd):  # the report written whole, then a link appears at its name before the rename
        if os.readlink(f"/proc/self/fd/{fd}").rsplit("/", 1)[-1].startswith(".score.json.tmp-"):
            os.symlink(target, out / "score.json")
        return real_fsync(fd)

    with pytest.raises(DatasetError, match="is a symbolic link; augsplit writes only to a new path or over a regular file"):
        with report_set(out, "score", ["score.json"]) as f:
            monkeypatch.setattr(os, "fsync", fsync)
            f.write("score.json", "{}")
    monkeypatch.undo()
    assert (out / "score.json").is_symlink() and target.read_text() == "the user's"  # was: replaced by the report
    assert not [p for p in os.listdir(out) if ".tmp-" in p]
