"""dovetail.audit: the precision measured from a clerk's decisions, as `dovetail audit`."""

from __future__ import annotations

import csv
import shutil

import dovetail

from conftest import ROOT, SAMPLE_CONFIG


def _truth():
    with open(ROOT / "sample-tables" / "truth.csv", newline="") as f:
        return {(r[0], r[1]) for r in list(csv.reader(f))[1:]}


def test_audit_measures_what_the_cli_measures(cli, tmp_path):
    text = SAMPLE_CONFIG.read_text().replace("../sample-tables/", f"{ROOT}/sample-tables/")
    text = text.replace("min_confidence = 0.5", "min_confidence = 0.5\naudit_sample = 80")
    config = tmp_path / "config.toml"
    config.write_text(text)
    folder = tmp_path / "run"
    dovetail.link(None, None, config).write(folder)
    # A scripted clerk answers every sampled link from the truth.
    truth = _truth()
    with open(folder / "audit.csv", newline="") as f:
        sample = [(r["left_id"], r["right_id"]) for r in csv.DictReader(f)]
    assert len(sample) == 80
    with open(folder / "decisions.csv", "w", newline="") as f:
        w = csv.writer(f)
        w.writerow(["left_id", "right_id", "decision", "reviewer", "decided_at"])
        for left, right in sample:
            word = "same" if (left, right) in truth else "different"
            w.writerow([left, right, word, "script", "2026-12-01T00:00:00Z"])
    copy = tmp_path / "copy"
    shutil.copytree(folder, copy)
    result = dovetail.audit(folder)
    m = result["measured"]
    assert m["decided"] == 80
    with open(folder / "links.csv", newline="") as f:
        links = [(r["left_id"], r["right_id"]) for r in csv.DictReader(f)]
    true_precision = sum(p in truth for p in links) / len(links)
    assert m["interval"][0] <= true_precision <= m["interval"][1]
    assert "Precision measured by clerical review" in (folder / "report.html").read_text()
    # The command-line tool on a copy of the same folder writes the same audit.json.
    cli("audit", copy, "--quiet")
    assert (copy / "audit.json").read_bytes() == (folder / "audit.json").read_bytes()
