"""Target-lesion response: the published thresholds worked by hand.

Sources: RANO-BM, Lin NU et al. Lancet Oncol 2015;16:e270-e278 (table of target response: PR
>= 30 % decrease vs baseline, PD >= 20 % increase vs nadir, at least one lesion grown by >= 5 mm);
RECIST 1.1, Eisenhauer EA et al. Eur J Cancer 2009;45:228-247 (PD also needs the sum to grow by
>= 5 mm; a new lesion is PD; fragments of a lesion are added).
"""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from pipeline.growth.response import (SCOPE, VOLUME_PD_PCT, VOLUME_PR_PCT, assess_response,
                                      lesion_measures, summarize_response, target_category)
from pipeline.settings import ResponseSettings


def measures(diameters: dict[int, list[float]], days: list[float], *, status=None,
             merged_into=None, measurable=True) -> pd.DataFrame:
    """Hand-made lesion_measures rows: volume of a sphere of the diameter (0 = absent)."""
    rows = []
    for lesion, values in diameters.items():
        for i, (day, d) in enumerate(zip(days, values)):
            if d is None:
                continue            # no row before the lesion first appears
            st = (status or {}).get((lesion, i), "present" if d > 0 else "absent")
            rows.append({"subject": "01", "lesion": lesion, "session": f"s{i}", "day": day,
                         "volume_mm3": np.nan if st == "merged" else np.pi / 6 * d ** 3,
                         "status": st, "diameter_mm": d,
                         "merged_into": (merged_into or {}).get((lesion, i), np.nan),
                         "measurable": measurable})
    return pd.DataFrame(rows)


def categories(table: pd.DataFrame) -> list[str]:
    return table["category"].tolist()


def test_partial_response_at_30_percent_below_a_50_mm_baseline():
    # Lin et al. 2015 / Eisenhauer et al. 2009: PR >= 30 % decrease; 50 mm -> PR at <= 35 mm
    assert target_category(35.0, 50.0, 50.0, lesion_growth_mm=0, new_lesions=0) == "PR"
    assert target_category(35.1, 50.0, 50.0, lesion_growth_mm=0, new_lesions=0) == "SD"
    out = assess_response(measures({1: [30.0, 15.0], 2: [20.0, 20.0]}, [0.0, 60.0]))
    assert categories(out) == ["baseline", "PR"]
    assert out["change_baseline_pct"].iloc[1] == pytest.approx(-30.0)
    assert out["change_baseline_mm"].iloc[1] == pytest.approx(-15.0)


def test_progression_at_20_percent_above_a_30_mm_nadir():
    # nadir 30 mm -> 36 mm is +20 % (6 mm >= 5 mm): PD (Lin et al. 2015)
    out = assess_response(measures({1: [50.0, 30.0, 36.0]}, [0.0, 60.0, 120.0]))
    assert categories(out) == ["baseline", "PR", "PD"]
    assert out["change_nadir_pct"].iloc[2] == pytest.approx(20.0)
    assert out["nadir_sum_mm"].iloc[2] == 30.0 and out["nadir_session"].iloc[2] == "s1"
    # 35.9 mm is +19.7 %: not PD, and still >= 30 % below baseline? 35.9 > 35 -> SD
    out = assess_response(measures({1: [50.0, 30.0, 35.9]}, [0.0, 60.0, 120.0]))
    assert categories(out)[2] == "SD"


def test_two_lesions_grown_3_mm_each_sum_rule_versus_lesion_rule():
    # nadir 15 + 15 = 30 mm -> 18 + 18 = 36 mm: +20 % and +6 mm in sum, but no lesion +5 mm.
    # RECIST 1.1 (sum >= 5 mm): PD; RANO-BM (one lesion >= 5 mm, from memory): not PD.
    table = measures({1: [15.0, 18.0], 2: [15.0, 18.0]}, [0.0, 60.0])
    recist = assess_response(table, settings=ResponseSettings(absolute_rule="sum"))
    rano = assess_response(table, settings=ResponseSettings(absolute_rule="lesion"))
    assert categories(recist) == ["baseline", "PD"]
    assert categories(rano) == ["baseline", "SD"]
    assert rano["max_lesion_growth_mm"].iloc[1] == pytest.approx(3.0)


def test_small_nadir_the_absolute_rule_decides():
    # nadir 20 mm: +20 % is only 4 mm, so PD needs 25 mm under either absolute rule
    for rule in ("lesion", "sum"):
        settings = ResponseSettings(absolute_rule=rule)
        assert categories(assess_response(measures({1: [20.0, 24.0]}, [0.0, 60.0]),
                                          settings=settings))[1] == "SD"
        assert categories(assess_response(measures({1: [20.0, 25.0]}, [0.0, 60.0]),
                                          settings=settings))[1] == "PD"


def test_new_lesion_at_stable_sums_is_progression():
    # a new lesion is PD (Lin et al. 2015; Eisenhauer et al. 2009), whatever the sums
    table = measures({1: [20.0, 20.0, 20.0], 2: [None, 0.0, 6.0]}, [0.0, 60.0, 120.0],
                     status={(2, 1): "absent", (2, 2): "new"})
    table = table[~((table.lesion == 2) & (table.session == "s1"))]
    out = assess_response(table)
    assert categories(out) == ["baseline", "SD", "PD"]
    assert out["new_lesions"].tolist() == [0, 0, 1]
    assert out["volume_category"].iloc[2] == "PD"


def test_complete_response_then_reappearance():
    # CR: every target gone; a target seen again after a 0 mm nadir has grown from 0 (PD)
    out = assess_response(measures({1: [20.0, 0.0, 6.0]}, [0.0, 60.0, 120.0]))
    assert categories(out) == ["baseline", "CR", "PD"]
    assert out["volume_category"].tolist() == ["baseline", "CR", "PD"]


def test_sphere_equivalent_volume_thresholds():
    # exact arithmetic: a sphere whose diameter is x 0.7 has volume x 0.343 (-65.7 %), x 1.2
    # gives x 1.728 (+72.8 %) (V ~ d^3)
    assert VOLUME_PR_PCT == pytest.approx(-65.7, abs=1e-12)
    assert VOLUME_PD_PCT == pytest.approx(72.8, abs=1e-12)
    out = assess_response(measures({1: [20.0, 14.0, 14.0 * 1.2]}, [0.0, 60.0, 120.0]))
    assert out["volume_change_baseline_pct"].iloc[1] == pytest.approx(-65.7)
    assert out["volume_category"].tolist() == ["baseline", "PR", "PD"]
    assert out["category"].tolist() == ["baseline", "PR", "SD"]    # 14 -> 16.8 mm: +2.8 mm


def test_baseline_is_the_last_session_before_the_first_event():
    days = [0.0, 50.0, 100.0, 130.0]
    table = measures({1: [10.0, 20.0, 30.0, 15.0]}, days)
    events = pd.DataFrame({"subject": ["01", "01"], "day": [100.0, 200.0],
                           "event": ["radiosurgery", "chemo"]})
    out = assess_response(table, events)
    # the session on the event's day precedes the treatment
    assert categories(out) == ["n/a", "n/a", "baseline", "PR"]
    assert out["change_baseline_pct"].iloc[3] == pytest.approx(-50.0)
    no_event = assess_response(table)
    assert categories(no_event)[0] == "baseline"
    before_any = assess_response(table, events.assign(day=-5.0))
    assert categories(before_any)[0] == "baseline"      # no session before: the first one


def test_targets_are_the_five_largest_measurable_lesions():
    sizes = {lesion: [10.0 + lesion] for lesion in range(1, 8)}
    table = measures(sizes, [0.0])
    small = measures({8: [40.0]}, [0.0], measurable=False)
    out = assess_response(pd.concat([table, small], ignore_index=True))
    assert out["n_target"].iloc[0] == 5 and out["targets"].iloc[0] == "7 6 5 4 3"
    assert out["sum_diameters_mm"].iloc[0] == pytest.approx(17 + 16 + 15 + 14 + 13)
    out = assess_response(table, settings=ResponseSettings(max_targets=2))
    assert out["targets"].iloc[0] == "7 6"
    none = assess_response(small)
    assert none["n_target"].iloc[0] == 0 and categories(none) == ["baseline"]


def test_target_merged_into_another_is_measured_once():
    # RECIST 1.1: coalesced lesions are measured as one lesion
    table = measures({1: [20.0, 30.0], 2: [12.0, 0.0]}, [0.0, 60.0],
                     status={(2, 1): "merged"}, merged_into={(2, 1): 1})
    out = assess_response(table)
    assert out["sum_diameters_mm"].tolist() == pytest.approx([32.0, 30.0])


def test_fragments_of_a_lesion_are_added():
    # RECIST 1.1 (Eisenhauer et al. 2009): the longest diameters of fragments are summed
    lon = pd.DataFrame({"subject": "01", "lesion": [1, 1], "session": ["a", "b"],
                        "day": [0.0, 60.0], "volume_mm3": [900.0, 700.0],
                        "status": "present"})
    comps = pd.DataFrame({"subject": "01", "session": ["a", "b", "b"], "component": [1, 1, 2],
                          "max_axial_diameter_mm": [14.0, 8.0, 7.0],
                          "measurable": ["true", "false", "false"]})
    assign = pd.DataFrame({"subject": "01", "session": ["a", "b", "b"], "component": [1, 1, 2],
                           "lesion": [1, 1, 1]})
    m = lesion_measures(lon, comps, assign)
    assert m["diameter_mm"].tolist() == [14.0, 15.0]
    assert assess_response(m)["category"].tolist() == ["baseline", "SD"]


def test_summary_best_response_progression_and_duration():
    out = assess_response(measures({1: [50.0, 30.0, 32.0, 40.0]}, [0.0, 60.0, 120.0, 180.0]))
    assert categories(out) == ["baseline", "PR", "PR", "PD"]
    s = summarize_response(out).iloc[0]
    assert s.best_response == "PR" and s.first_progression_day == 180.0
    assert s.response_start_day == 60.0 and s.response_duration_days == 120.0
    assert not s.response_ongoing and s.best_change_baseline_pct == pytest.approx(-40.0)
    assert (out["scope"] == SCOPE).all() and "non-target" in SCOPE and "clinicians" in SCOPE


def test_settings_refuse_an_unknown_rule():
    with pytest.raises(ValueError, match="absolute_rule"):
        ResponseSettings(absolute_rule="volume")
