"""Phases and fit exclusions (rules of docs/outputs.md §4.7 and §5.7, fits.tsv)."""
import numpy as np
import pandas as pd
import pytest

from pipeline.errors import UsageError
from pipeline.growth.phases import assign_phases
from pipeline.settings import FitSettings


def _lon(days, volumes, lesion=1, subject="01", **extra):
    n = len(days)
    data = {"subject": subject, "lesion": lesion, "session": [f"s{i}" for i in range(n)],
            "day": np.asarray(days, float), "volume_mm3": np.asarray(volumes, float),
            "status": "present", "components": 1, "merged_into": "", "merged_from": "",
            "group": ""}
    data.update(extra)
    return pd.DataFrame(data)


def _events(rows):
    return pd.DataFrame(rows, columns=["subject", "day", "event", "lesion"])


def test_session_on_event_day_belongs_to_phase_before():
    # Reference: docs/outputs.md §5.4: "A session on an event's day belongs to the phase before it".
    lon = _lon([0, 30, 60, 90], [10, 20, 30, 40])
    out = assign_phases(lon, _events([["01", 30.0, "radiosurgery", np.nan]]),
                        settings=FitSettings(from_nadir=False))
    assert out["phase"].tolist() == ["untreated", "untreated", "after-radiosurgery",
                                     "after-radiosurgery"]


def test_lesion_specific_event_and_repeats():
    # Reference: docs/outputs.md §3.3 and §5.7: events with a lesion apply to that lesion only;
    # "after-<event>-2" for a repeat.
    lon = pd.concat([_lon([0, 10, 20, 30, 40], [5, 6, 7, 8, 9], lesion=1),
                     _lon([0, 10, 20, 30, 40], [5, 6, 7, 8, 9], lesion=2)], ignore_index=True)
    ev = _events([["01", 15.0, "radiosurgery", 2], ["01", 25.0, "radiosurgery", 2],
                  ["01", 35.0, "chemotherapy", np.nan], ["02", 1.0, "resection", np.nan]])
    out = assign_phases(lon, ev, settings=FitSettings(from_nadir=False))
    assert out[out.lesion == 1]["phase"].tolist() == ["untreated"] * 4 + ["after-chemotherapy"]
    assert out[out.lesion == 2]["phase"].tolist() == [
        "untreated", "untreated", "after-radiosurgery", "after-radiosurgery-2",
        "after-chemotherapy"]


def test_same_day_events_share_one_phase_and_early_event():
    # Reference: docs/outputs.md §5.7: "untreated before the first event that applies to the lesion"
    # (an event before the lesion's first session means it has no untreated phase).
    lon = _lon([10, 20, 30], [5, 6, 7])
    ev = _events([["01", 5.0, "resection", np.nan], ["01", 5.0, "radiosurgery", np.nan]])
    out = assign_phases(lon, ev, settings=FitSettings(from_nadir=False))
    assert set(out["phase"]) == {"after-resection+radiosurgery"}


def test_nadir_rule_keeps_the_decline_out():
    # Reference: nadir = smallest measurement on study (RECIST 1.1, Eisenhauer et al. Eur J
    # Cancer 2009;45:228-247); the regrowth from it is fitted (issue 4, item 3).
    lon = _lon([0, 30, 60, 90, 120, 150], [100, 120, 60, 30, 45, 70])
    ev = _events([["01", 30.0, "radiosurgery", np.nan]])
    out = assign_phases(lon, ev)
    assert out["fit_exclusion"].tolist() == ["", "", "before-nadir", "", "", ""]
    assert out["in_fit"].tolist() == [True, True, False, True, True, True]
    kept = assign_phases(lon, ev, settings=FitSettings(from_nadir=False))
    assert kept["in_fit"].all()


def test_absent_nadir_and_exclusion_reasons():
    # Reference: docs/methods.md §1.4: zero volumes are never logged (left out here, not censored).
    lon = _lon([0, 10, 20, 30, 40, 50], [100, 3, 0, 5, 30, np.nan],
               status=["present"] * 5 + ["merged"])
    ev = _events([["01", 5.0, "radiosurgery", np.nan]])
    out = assign_phases(lon, ev, settings=FitSettings(detection_limit_mm3=0.0))
    assert out["fit_exclusion"].tolist() == ["", "before-nadir", "absent", "", "", "merged"]
    out = assign_phases(lon, ev, settings=FitSettings(detection_limit_mm3=4.0, from_nadir=False))
    assert out["fit_exclusion"].tolist() == ["", "below-detection", "absent", "", "", "merged"]


def test_merged_sum_is_configurable():
    # Reference: docs/outputs.md §4.5: the survivor's rows from a merge on are left out unless the
    # configuration asks to fit the sum.
    lon = _lon([0, 10, 20], [10, 12, 30], merged_from=["", "", "2"])
    assert assign_phases(lon)["fit_exclusion"].tolist() == ["", "", "merged-sum"]
    out = assign_phases(lon, settings=FitSettings(fit_merged_sum=True))
    assert out["in_fit"].all()


def test_input_not_modified_and_order_kept():
    # Reference: house style: stage functions never mutate inputs (common practice).
    lon = _lon([20, 0, 10], [3, 1, 2])
    before = lon.copy()
    out = assign_phases(lon, _events([["01", 15.0, "chemotherapy", np.nan]]))
    pd.testing.assert_frame_equal(lon, before)
    assert out["session"].tolist() == ["s0", "s1", "s2"]
    assert out["phase"].tolist() == ["after-chemotherapy", "untreated", "untreated"]


def test_missing_columns_are_refused():
    with pytest.raises(UsageError, match="longitudinal table lacks column"):
        assign_phases(pd.DataFrame({"subject": ["01"]}))
    with pytest.raises(UsageError, match="events table lacks column"):
        assign_phases(_lon([0], [1]), pd.DataFrame({"subject": ["01"], "day": [1.0]}))
    with pytest.raises(UsageError, match="row 1: needs a numeric day"):
        assign_phases(_lon([0], [1]), pd.DataFrame({"subject": ["01"], "day": ["x"],
                                                   "event": ["a"]}))
