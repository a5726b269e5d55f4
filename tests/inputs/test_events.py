"""Events become phase boundaries by the rule of docs/outputs.md §5.4: a session on an event's day
belongs to
the phase before it (imaging precedes treatment that day), also when the session has a time."""
from __future__ import annotations

import pandas as pd
import pytest

from pipeline.inputs.manifest import parse_when
from pipeline.run.stages import read_events
from pipeline.growth.phases import assign_phases


def test_session_with_a_time_on_a_date_only_event_day_is_before_it(tmp_path):
    # Reference: docs/outputs.md §5.4, "A session on an event's day belongs to the phase before it".
    origin = parse_when("2024-01-01T15:00:00", "date")
    days = [parse_when(t, "date") - origin for t in
            ("2024-01-01T15:00:00", "2024-02-01T09:00:00", "2024-03-01T10:00:00",
             "2024-03-02T08:00:00", "2024-04-01T08:00:00")]
    (tmp_path / "e.tsv").write_text("subject\tdate\tevent\nS\t2024-03-01\tradiosurgery\n")
    events, errors = read_events(tmp_path / "e.tsv", {"S": origin}, {"S"})
    assert errors == []
    longitudinal = pd.DataFrame({"subject": "S", "lesion": 1, "session": list("12345"),
                                 "day": days, "volume_mm3": [100.0, 150, 220, 200, 260],
                                 "status": "present", "components": 1, "merged_into": "",
                                 "merged_from": "", "group": ""})
    phased = assign_phases(longitudinal, events)
    assert phased.phase.tolist() == ["untreated"] * 3 + ["after-radiosurgery"] * 2
    assert events.day_given.iloc[0] == round(parse_when("2024-03-01", "date") - origin, 6)


def _events_file(tmp_path, text):
    path = tmp_path / "events.tsv"
    path.write_text(text)
    return path


def test_event_day_with_a_dated_manifest_counts_from_the_first_session(tmp_path):
    # Reference: README (Inputs): an events `day` counts the days since the subject's first
    # session when the manifest gives dates.
    origin = parse_when("2024-01-15", "date")
    path = _events_file(tmp_path, "subject\tday\tevent\nS\t100\tradiosurgery\n")
    events, errors = read_events(path, {"S": origin}, {"S"}, manifest_kind="date")
    assert errors == [] and events.day_given.tolist() == [100.0]
    longitudinal = pd.DataFrame({"subject": "S", "lesion": 1, "session": list("abcd"),
                                 "day": [0.0, 60, 120, 160], "volume_mm3": [100.0, 150, 90, 120],
                                 "status": "present"})
    phases = assign_phases(longitudinal, events).phase.tolist()
    assert phases == ["untreated"] * 2 + ["after-radiosurgery"] * 2


def test_event_day_with_a_day_manifest_uses_the_manifest_reference(tmp_path):
    # Reference: README (Inputs): a `day` uses the same reference as the manifest's `day`
    # column; the subject's first session is on manifest day 400 (its day 0).
    path = _events_file(tmp_path, "subject\tday\tevent\nS\t460\tsurgery\n")
    events, errors = read_events(path, {"S": 400.0}, {"S"}, manifest_kind="day")
    assert errors == [] and events.day_given.tolist() == [60.0]


def test_event_dates_with_a_day_manifest_are_refused_in_one_line(tmp_path):
    # Reference: README (Inputs): manifest days come "from any reference", so a calendar date
    # has no place among them.
    path = _events_file(tmp_path, "subject\tdate\tevent\nS\t2024-03-01\tsurgery\n"
                                  "S\t2024-05-01\tradiosurgery\n")
    events, errors = read_events(path, {"S": 0.0}, {"S"}, manifest_kind="day")
    assert len(events) == 0 and len(errors) == 1
    assert errors[0]["stage"] == "events" and "\n" not in errors[0]["reason"]
    assert "events.tsv" in errors[0]["reason"] and "manifest gives days" in errors[0]["reason"]


def test_event_far_outside_the_follow_up_is_warned_about(tmp_path):
    path = _events_file(tmp_path, "subject\tday\tevent\nS\t5000\tsurgery\nS\t200\tchemo\n")
    warnings: list[str] = []
    events, errors = read_events(path, {"S": 0.0}, {"S"}, manifest_kind="date",
                                 follow_up={"S": (0.0, 160.0)}, warnings=warnings)
    assert errors == [] and len(events) == 2
    assert len(warnings) == 1 and "row 2" in warnings[0] and "5000" in warnings[0]


@pytest.mark.parametrize("text, ok", [("1e308", False), ("-2000000", False), ("999999", True),
                                      ("36500", True)])
def test_absurd_days_are_refused_with_the_bound(text, ok):
    # Reference: common practice; the bound is stated in the message (1,000,000 days).
    if ok:
        assert parse_when(text, "day") == float(text)
    else:
        with pytest.raises(ValueError, match="beyond \\+-1000000 days"):
            parse_when(text, "day")


def test_run_places_day_events_of_a_dated_manifest_and_refuses_dates_with_days(tmp_path):
    # Reference: README (Inputs, Exit status): day events with a dated manifest count from the
    # first session; the refused events file is one errors.tsv row and exit status 1.
    import datetime

    from cohort import make_cohort
    from pipeline.cli import main
    from pipeline.io.tsv import read_table

    make_cohort(tmp_path / "in")
    lines = (tmp_path / "in" / "manifest.tsv").read_text().splitlines()
    dated = ["subject\tsession\tmask\tdate"] + [
        "\t".join(row[:3] + [str(datetime.date(2024, 1, 1) + datetime.timedelta(int(row[3])))])
        for row in (line.split("\t") for line in lines[1:])]
    (tmp_path / "in" / "dated.tsv").write_text("\n".join(dated) + "\n")
    by_day = _events_file(tmp_path, "subject\tday\tevent\nA\t100\tradiosurgery\n")
    assert main(["run", str(tmp_path / "in" / "dated.tsv"), "-o", str(tmp_path / "o1"),
                 "--events", str(by_day), "-q"]) == 1        # B's missing mask only
    assert read_table(tmp_path / "o1" / "events.tsv").day.tolist() == [100.0]
    fits = read_table(tmp_path / "o1" / "fits.tsv")
    assert set(fits[fits.subject == "A"].phase) == {"untreated", "after-radiosurgery"}
    (tmp_path / "by_date.tsv").write_text("subject\tdate\tevent\nA\t2024-04-10\tsurgery\n")
    assert main(["run", str(tmp_path / "in" / "manifest.tsv"), "-o", str(tmp_path / "o2"),
                 "--events", str(tmp_path / "by_date.tsv"), "-q"]) == 1
    errors = read_table(tmp_path / "o2" / "errors.tsv")
    assert errors.stage.tolist().count("events") == 1
    assert set(read_table(tmp_path / "o2" / "fits.tsv").phase) == {"untreated"}
