"""Reports: audit.json keys are stable and complete, the HTML page is self-contained."""

import base64
import json
import re

import pytest

from augsplit.audit import Thresholds, run_audit, summary_table, write_reports
from augsplit.audit.report import SCHEMA
from synthetic import AXES, make_dataset, plant


@pytest.fixture(scope="module")
def leaky_result():
    ds, _ = plant(make_dataset(n_train=60, n_test=30, seed=5), "copy")
    return run_audit(ds.table, AXES, thresholds=Thresholds(margin=0.05, footprint_disjoint=True),
                     image_loader=ds.image_loader, mask_loader=ds.mask_loader)


def test_json_has_documented_keys_and_every_number(leaky_result, tmp_path):
    paths = write_reports(leaky_result, tmp_path)
    doc = json.loads(paths["json"].read_text())
    assert doc["schema"] == SCHEMA and doc["verdict"] == "fail" and doc["exit_code"] == 1
    assert set(doc) == {"schema", "verdict", "exit_code", "pairs", "inputs", "checks", "skipped"}
    by_key = {c["key"]: c for c in doc["checks"]}
    nd = by_key["near_duplicates:train/test"]
    assert nd["numbers"]["n_exact_duplicates"] == 1 and nd["worst"][0]["exact_copy"] is True
    for c in leaky_result.checks:  # every number of every check is written
        assert by_key[c.key]["numbers"].keys() == c.numbers.keys()
    # the module docstring documents each check's keys for the README
    import augsplit.audit.report as rep
    for c in doc["checks"]:
        assert c["name"] in rep.__doc__
        for k in c["numbers"]:
            assert k in rep.__doc__, (c["name"], k)


def test_html_is_self_contained_with_plots_and_thumbnails(leaky_result, tmp_path):
    html = write_reports(leaky_result, tmp_path)["html"].read_text()
    imgs = re.findall(r'src="data:image/png;base64,([^"]+)"', html)
    assert len(imgs) >= 5  # axes, distances, coverage, hash distances, thumbnails
    assert all(base64.b64decode(b)[:8] == b"\x89PNG\r\n\x1a\n" for b in imgs)
    assert "http" not in html.replace("http-equiv", "")  # nothing fetched from elsewhere
    assert "Worst offenders" in html


def test_terminal_table_lists_each_check_and_verdict(leaky_result):
    text = summary_table(leaky_result)
    for c in leaky_result.checks:
        assert c.name in text
    assert text.splitlines()[-1].startswith("audit FAIL")
