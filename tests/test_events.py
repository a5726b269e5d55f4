"""Events become phase boundaries by the contract's rule: a session on an event's day belongs to
the phase before it (imaging precedes treatment that day), also when the session has a time."""
from __future__ import annotations

import pandas as pd

from pipeline.inputs import parse_when
from pipeline.later_stages import read_events
from pipeline.phases import assign_phases


def test_session_with_a_time_on_a_date_only_event_day_is_before_it(tmp_path):
    # Reference: CONTRACT.md, "A session on an event's day belongs to the phase before it".
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
