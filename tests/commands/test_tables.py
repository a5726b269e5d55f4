"""Every table a run writes has one column dictionary (``pipeline.run.catalog``), and the table,
its JSON sidecar and that dictionary agree.

Reference: BIDS specification, "Tabular files" (a TSV's columns are described in a JSON sidecar
of the same name, one key per column) and docs/outputs.md (the key columns of each table, in
order). Invented data (tests/cohort.py).
"""
from __future__ import annotations

import json

import pytest
from cohort import make_cohort

from pipeline.cli import main
from pipeline.run.catalog import key_columns, tables


@pytest.fixture(scope="module")
def out(tmp_path_factory):
    folder = tmp_path_factory.mktemp("tables")
    make_cohort(folder / "in")
    (folder / "events.tsv").write_text("subject\tday\tevent\nA\t90\tradiosurgery\n")
    (folder / "outcomes.tsv").write_text("subject\tlesion\toutcome\nA\t1\tprogression\n"
                                         "A\t2\tstable\nB\t1\tprogression\nB\t2\tstable\n")
    out = folder / "out"
    code = main(["run", str(folder / "in" / "manifest.tsv"), "-o", str(out), "--events",
                 str(folder / "events.tsv"), "-q"])
    assert code == 1                      # the cohort holds one missing mask (subject B)
    assert main(["evaluate", str(out), "--outcomes", str(folder / "outcomes.tsv"),
                 "--positive", "progression"]) == 0
    return out


def header(path):
    return path.read_text(encoding="utf-8").split("\n", 1)[0].split("\t")


def test_every_written_table_is_in_the_catalog(out):
    written = sorted(p.name for p in out.glob("*.tsv"))
    assert {"lesions.tsv", "masks.tsv", "errors.tsv", "matches.tsv", "longitudinal.tsv",
            "lesion_components.tsv", "fits.tsv", "group_fits.tsv", "unfitted.tsv", "events.tsv",
            "response.tsv", "response_subjects.tsv", "evaluation.tsv",
            "evaluation_thresholds.tsv"} <= set(written)
    assert [name for name in written if name not in tables()] == []


def test_columns_sidecars_and_dictionaries_agree(out):
    for path in sorted(out.glob("*.tsv")):
        dictionary = tables()[path.name]
        columns = header(path)
        sidecar = json.loads(path.with_suffix(".json").read_text(encoding="utf-8"))
        assert sidecar == json.loads(json.dumps(dictionary)), path.name
        undescribed = [c for c in columns if c not in dictionary]
        assert undescribed == [], f"{path.name}: columns without a description {undescribed}"
        keys = key_columns(path.name)
        assert columns[:len(keys)] == list(keys), f"{path.name}: key columns first, in order"


def test_the_check_sees_an_undescribed_column(out, tmp_path):
    # The agreement test must be able to fail: a column the dictionary lacks is named.
    bad = tmp_path / "lesions.tsv"
    bad.write_text((out / "lesions.tsv").read_text().replace("volume_mm3", "volume_ml", 1))
    assert "volume_ml" in [c for c in header(bad) if c not in tables()["lesions.tsv"]]


def test_evaluate_takes_the_bootstrap_from_its_config(out, tmp_path):
    # `evaluate --config` reads [evaluate] like every other command reads its section; the
    # resample count reaches evaluation.tsv's n_boot column (docs/outputs.md, evaluation.tsv).
    from pipeline.io.tsv import read_table

    config = tmp_path / "eval.toml"
    config.write_text("[evaluate]\nbootstrap = 300\nseed = 7\n")
    outcomes = out.parent / "outcomes.tsv"
    assert main(["evaluate", str(out), "--outcomes", str(outcomes), "--positive",
                 "progression", "--config", str(config)]) == 0
    assert read_table(out / "evaluation.tsv")["n_boot"].tolist() == [300]
    assert main(["evaluate", str(out), "--outcomes", str(outcomes), "--positive",
                 "progression"]) == 0
    assert read_table(out / "evaluation.tsv")["n_boot"].tolist() == [2000]
