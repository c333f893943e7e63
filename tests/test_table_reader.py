"""One reader for foreign tables: the same rows and columns whether a table comes as CSV, TSV,
a Parquet file or a folder of Parquet parts (hive partitions included), and whichever command
reads it (assign, audit, score, the parameter log). Bad tables: one line naming the file."""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from specs import spec_dict, write_spec

from augsplit.cli import main
from augsplit.errors import DatasetError
from augsplit.formats.table import open_table_file, read_table

ROWS = pd.DataFrame({"id": np.arange(8), "split": ["train", "test"] * 4,
                     "x": [1.0, 50.0, 3.5, 60.0, 7.0, 45.0, 11.0, 63.0], "y": [2.0, 3, 4, 5, 6, 7, 8, 9]})


def as_every_format(df: pd.DataFrame, d) -> dict:
    """`df` written each way a user may hand it over; name -> path."""
    paths = {}
    for name, sep in (("t.csv", ","), ("t.tsv", "\t"), ("t.tab", "\t"), ("tabs.csv", "\t"), ("semi.txt", ";")):
        df.to_csv(d / name, sep=sep, index=False)
        paths[name] = d / name
    df.to_parquet(d / "t.parquet", index=False)
    paths["t.parquet"] = d / "t.parquet"
    hive = d / "hive"
    for split, g in df.groupby("split"):
        (hive / f"split={split}").mkdir(parents=True)
        g.drop(columns="split").to_parquet(hive / f"split={split}" / "part-0.parquet", index=False)
    (hive / "split=test" / ".part-1.parquet.tmp-9").write_bytes(b"half written")  # hidden: never read
    paths["hive"] = hive
    return paths


def canonical(df: pd.DataFrame) -> pd.DataFrame:
    df = df.sort_values("id").reset_index(drop=True)
    return df[sorted(df.columns)].astype({"split": str})


def test_every_format_gives_the_same_table(tmp_path):
    want = canonical(ROWS)
    for name, p in as_every_format(ROWS, tmp_path).items():
        got = canonical(read_table(p))
        pd.testing.assert_frame_equal(got, want, check_dtype=False, obj=name)


def test_streamed_batches_are_bounded_and_carry_the_partition(tmp_path):
    t = open_table_file(as_every_format(ROWS, tmp_path)["hive"])
    batches = list(t.iter_batches(["split", "x"], batch_rows=3))
    assert all(len(b) <= 3 and list(b.columns) == ["split", "x"] for b in batches)
    assert sum(map(len, batches)) == len(ROWS) and set(pd.concat(batches)["split"]) == {"train", "test"}


def test_tsv_audits_like_the_csv(tmp_path, monkeypatch, capsys):
    """Measured on main: the same .tsv gave three columns through assign and one column
    'split\\tx\\ty' through the audit, so `augsplit audit t.tsv --axis x=0:64` failed."""
    monkeypatch.chdir(tmp_path)
    paths = as_every_format(ROWS, tmp_path)
    docs = {}
    for name, p in paths.items():
        assert main(["audit", str(p), "--axis", "x=0:64", "--quiet", "--out", str(tmp_path / f"rep-{name}")]) == 0
        docs[name] = json.loads((tmp_path / f"rep-{name}" / "audit.json").read_text())
    capsys.readouterr()
    numbers = {n: {c["name"]: c["numbers"] for c in d["checks"]} for n, d in docs.items()}
    for name in paths:
        assert numbers[name] == numbers["t.csv"], name
    assert docs["t.tsv"]["inputs"]["rows_per_split"] == {"train": 4, "test": 4}


def test_assign_labels_every_format_alike(tmp_path, capsys):
    spec = write_spec(tmp_path, spec_dict())
    labels = {}
    wrong = ROWS.assign(split=["test", "train"] * 4)  # assign must relabel every row from x
    for name, p in as_every_format(wrong, tmp_path).items():
        out = tmp_path / f"{name}.out.csv"
        assert main(["assign", str(spec), str(p), "--replace-split", "--out", str(out)]) == 0, capsys.readouterr().err
        got = pd.read_csv(out).sort_values("id")
        labels[name] = list(got["split"])
    assert all(v == ["train", "test"] * 4 for v in labels.values()), labels


def test_predictions_keep_their_text_columns_verbatim(tmp_path):
    p = tmp_path / "pred.tsv"
    p.write_text("image_id\tpredicted\tscore_a\n007\tNA\t0.5\nnan\tNone\t\n")
    df = read_table(p, text=("image_id", "predicted"))
    assert list(df["image_id"]) == ["007", "nan"] and list(df["predicted"]) == ["NA", "None"]
    assert df["score_a"].isna().tolist() == [False, True]  # other columns: pandas' NA strings as usual


BAD = {
    "missing": (lambda d: d / "nope.csv", "no such file or folder"),
    "empty file": (lambda d: _write(d / "e.csv", b""), "is empty"),
    "header only": (lambda d: _write(d / "h.csv", b"split,x\n"), "has no rows"),
    "garbage parquet": (lambda d: _write(d / "g.parquet", b"not a parquet file at all"), "unreadable table"),
    "binary as csv": (lambda d: _write(d / "b.csv", bytes(range(256)) * 4), "unreadable table"),
    "folder without tables": (lambda d: _write(d / "notes" / "a.csv", b"x\n1\n").parent, "holds no Parquet files"),
    "unknown type": (lambda d: _write(d / "t.xlsx", b"PK\x03\x04"), "unknown file type .xlsx"),
    "ragged csv": (lambda d: _write(d / "r.csv", b"split,x\ntrain,1\ntest,2,3,4\n"), "unreadable table"),
}


def _write(p, data: bytes):
    p.parent.mkdir(exist_ok=True)
    p.write_bytes(data)
    return p


@pytest.mark.parametrize("case", list(BAD))
def test_bad_tables_are_one_line_naming_the_file(case, tmp_path, capsys):
    make, words = BAD[case]
    p = make(tmp_path)
    with pytest.raises(DatasetError) as e:
        read_table(p)
    assert words in str(e.value) and "\n" not in str(e.value) and str(e.value).startswith(str(p))
    spec = write_spec(tmp_path, spec_dict())
    for argv in (["assign", str(spec), str(p), "--out", str(tmp_path / "o.csv")],
                 ["audit", str(p), "--axis", "x=0:64", "--quiet", "--out", str(tmp_path / "rep")]):
        assert main(argv) == 2
        err = capsys.readouterr().err
        assert err.count("\n") == 1 and str(p) in err and words in err, err


names = st.text(alphabet="abcdefghij", min_size=1, max_size=6)


@settings(max_examples=25, deadline=None)
@given(st.lists(st.tuples(st.floats(-1e9, 1e9, allow_nan=False), st.integers(-10**12, 10**12), names),
                min_size=1, max_size=12))
def test_round_trip_through_every_format(tmp_path_factory, rows):
    """Whatever the values, CSV, TSV and Parquet read back the same frame (pandas writes
    floats with repr, which round-trips: Python docs, float.__repr__)."""
    df = pd.DataFrame(rows, columns=["f", "i", "s"])
    d = tmp_path_factory.mktemp("rt")
    df.to_csv(d / "a.csv", index=False)
    df.to_csv(d / "a.tsv", sep="\t", index=False)
    df.to_parquet(d / "a.parquet", index=False)
    for name in ("a.csv", "a.tsv", "a.parquet"):
        pd.testing.assert_frame_equal(read_table(d / name), df, check_dtype=False, obj=name)


def test_a_trailing_comma_on_every_row_keeps_the_columns_in_place(tmp_path):
    # pandas made the first column the index of such a file, so image_id held the classes
    p = tmp_path / "p.csv"
    p.write_text("image_id,predicted\na,x,\nb,y,\n")
    assert read_table(p).to_dict("list") == {"image_id": ["a", "b"], "predicted": ["x", "y"]}


@pytest.mark.parametrize("rows", ["a,x,extra\nb,y\n", "a,x\nb,y,extra\n"])
def test_a_row_with_more_values_than_the_header_is_refused(tmp_path, rows):
    p = tmp_path / "p.csv"
    p.write_text("image_id,predicted\n" + rows)
    with pytest.raises(DatasetError) as e:
        read_table(p)
    assert "p.csv" in str(e.value) and ("more values than the header" in str(e.value) or "saw 3" in str(e.value))
