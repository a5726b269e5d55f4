"""response.tsv written by `run` and `fit`, checked against lesions.tsv itself (invented data)."""
from __future__ import annotations

import json

import numpy as np
import pytest

from cohort import make_cohort
from pipeline.cli import main
from pipeline.growth.response import COLUMNS, SCOPE, SUMMARY_COLUMNS
from pipeline.io.tsv import read_table

CONTRACT = ("subject session day n_target sum_diameters_mm change_baseline_pct change_nadir_pct "
            "new_lesions category sum_volume_mm3 volume_change_baseline_pct "
            "volume_category").split()


@pytest.fixture(scope="module")
def ran(tmp_path_factory):
    folder = tmp_path_factory.mktemp("response")
    make_cohort(folder / "in")
    (folder / "events.tsv").write_text("subject\tevent\tday\nA\tradiosurgery\t80\n"
                                       "B\tchemotherapy\t40\n")
    code = main(["run", str(folder / "in" / "manifest.tsv"), "-o", str(folder / "out"),
                 "--events", str(folder / "events.tsv"), "-q"])
    assert code == 1                       # the cohort's missing file, the rest written
    return folder


def test_columns_sidecar_and_scope(ran):
    out = ran / "out"
    table = read_table(out / "response.tsv")
    assert table.columns[:len(CONTRACT)].tolist() == CONTRACT
    # "n/a" is read back as missing (BIDS)
    assert set(table.category.fillna("n/a")) <= {"baseline", "CR", "PR", "SD", "PD", "n/a"}
    assert (table.scope == SCOPE).all()
    for name, doc in (("response", COLUMNS), ("response_subjects", SUMMARY_COLUMNS)):
        sidecar = json.loads((out / f"{name}.json").read_text())
        assert set(sidecar) == set(read_table(out / f"{name}.tsv").columns) == set(doc)
        assert "non-target" in sidecar["scope"]["Description"]


def test_baseline_and_sums_follow_lesions_tsv(ran):
    out = ran / "out"
    table = read_table(out / "response.tsv")
    lesions = read_table(out / "lesions.tsv")
    comps = read_table(out / "lesion_components.tsv")
    b = table[table.subject == "B"].reset_index(drop=True)
    # the event on day 40: baseline is the session of day 40 (imaging precedes treatment)
    assert b.category.fillna("n/a").tolist() == ["n/a", "baseline", "SD"]
    # the target is subject B's measurable lesion; its sum is that component's diameter
    joined = comps.merge(lesions, on=["subject", "session", "component"])
    chosen = joined[(joined.subject == "B") & (joined.session == "2") & joined.measurable]
    assert len(chosen) == 1 and b.n_target.iloc[1] == 1
    target = chosen.lesion.iloc[0]
    mine = joined[(joined.subject == "B") & (joined.lesion == target)].sort_values("day")
    np.testing.assert_allclose(b.sum_diameters_mm, mine.max_axial_diameter_mm)
    np.testing.assert_allclose(b.sum_volume_mm3, mine.volume_mm3)
    expected = 100 * (mine.max_axial_diameter_mm.iloc[2] / mine.max_axial_diameter_mm.iloc[1] - 1)
    assert b.change_baseline_pct.iloc[2] == pytest.approx(expected)


def test_fit_rewrites_it_and_the_setting_turns_it_off(ran, tmp_path):
    out = ran / "out"
    before = (out / "response.tsv").read_bytes()
    (out / "response.tsv").unlink()
    assert main(["fit", str(out), "--events", str(ran / "events.tsv")]) in (0, 1)
    assert (out / "response.tsv").read_bytes() == before
    config = tmp_path / "c.toml"
    config.write_text("[response]\nwrite = false\n")
    (out / "response.tsv").unlink()
    assert main(["fit", str(out), "--config", str(config)]) in (0, 1)
    assert not (out / "response.tsv").exists()
