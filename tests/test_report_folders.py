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
from augsplit.report_folder import REPORTS_LIST


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
    assert not (own / REPORTS_LIST).exists()
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

    def broken(result, path):
        raise OSError("disk full")

    out = tmp_path / "cut"
    monkeypatch.setattr(report, "write_html", broken)
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
