"""`lesion-growth demo` end to end: the invented cohort's known truth comes out of the tables."""
from __future__ import annotations

import json

import pytest

from pipeline.cli import main
from pipeline.io.tsv import read_table


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    import pipeline.report.build as build

    out = tmp_path_factory.mktemp("demo") / "out"
    calls = []
    original = build.write_report

    def counted(*args, **kwargs):
        calls.append(args)
        return original(*args, **kwargs)
    build.write_report = counted
    try:
        code = main(["demo", str(out), "--subjects", "6", "-q"])
    finally:
        build.write_report = original
    _REPORT_BUILDS[:] = calls
    return out, code, json.loads((out / "inputs" / "truth.json").read_text())


_REPORT_BUILDS: list = []


def test_demo_builds_its_report_once_with_the_evaluation(demo):
    out, _, _ = demo
    assert len(_REPORT_BUILDS) == 1
    index = (out / "report.html").read_text(encoding="utf-8")
    evaluation = index.split('id="evaluation"')[1].split("</section>")[0]
    assert "<table" in evaluation    # built after evaluate: the evaluation is on the page
    assert len(list((out / "report").glob("subject-*.html"))) == 6


def test_demo_exit_and_outputs(demo):
    out, code, _ = demo
    assert code == 0     # only planted failures (none among the first six subjects)
    for name in ("lesions.tsv", "matches.tsv", "longitudinal.tsv", "fits.tsv", "group_fits.tsv",
                 "errors.tsv", "report.html", "provenance.json", "dataset_description.json"):
        assert (out / name).is_file(), name


def test_demo_truth_split_merge_new_vanish(demo):
    # Reference: the generator's truth.json (the scenario it drew), not the tool's own output.
    out, _, truth = demo
    matches = read_table(out / "matches.tsv")
    longitudinal = read_table(out / "longitudinal.tsv")
    expected = truth["expected"]
    for split in expected["splits"]:
        rows = matches[(matches.subject == split["subject"]) & (matches.relation == "splits")
                       & (matches.session_to == split["session"])]
        assert len(rows) >= 2, split
    for merge in expected["merges"]:
        rows = longitudinal[(longitudinal.subject == merge["subject"])
                            & (longitudinal.session == merge["session"])]
        absorbed = rows[rows.lesion.isin(merge["absorbed"])]
        assert (absorbed.status == "merged").all() and len(absorbed) == len(merge["absorbed"])
        assert str(merge["lesion"]) in set(absorbed.merged_into.astype(str))
    for new in expected["new"]:
        row = longitudinal[(longitudinal.subject == new["subject"])
                           & (longitudinal.lesion == new["lesion"])].iloc[0]
        assert row.session == new["session"] and row.status == "new"
    for gone in expected["vanish"]:
        track = longitudinal[(longitudinal.subject == gone["subject"])
                             & (longitudinal.lesion == gone["lesion"])]
        status = dict(zip(track.session, track.status))
        assert all(status[s] == "absent" for s in gone["absent_sessions"])
        assert status[gone["returns_session"]] == "present"


def test_demo_response_categories_match_the_planned_story(demo):
    # Reference: the generator's planned target-lesion categories (volume folds chosen with
    # margins against the RANO-BM thresholds, Lin NU et al. Lancet Oncol 2015), not the tool's
    # own output
    out, _, truth = demo
    planned = truth["expected"]["response"]
    assert planned, "the demo has a response story"
    response = read_table(out / "response.tsv")
    response["category"] = response["category"].fillna("n/a")     # n/a is read back as missing
    got = {(r.subject, r.session): r.category for r in response.itertuples()}
    for item in planned:
        assert got[(item["subject"], item["session"])] == item["category"], item


def test_report_shows_population_response_and_both_estimates(demo):
    # The population tables, the response summary and, on each subject's page, the lesion's own
    # beta beside its population estimate: the report shows what fit wrote (never recomputes).
    out, _, _ = demo
    from pipeline.io.tsv import read_table

    index = (out / "report.html").read_text(encoding="utf-8")
    population = read_table(out / "population_fits.tsv")
    assert "<section id=\"population\">" in index and "Population model" in index
    assert index.count("<tr>", index.index("id=\"population\""),
                       index.index("id=\"response\"")) == len(population) + 1
    assert "Target-lesion radiographic component only" in index
    lesions = read_table(out / "population_lesions.tsv")
    subject = str(lesions[lesions["model"] == "power"]["subject"].iloc[0])
    page = (out / "report" / f"subject-{subject}.html").read_text(encoding="utf-8")
    assert "beta, population estimate" in page and "share from the population" in page
