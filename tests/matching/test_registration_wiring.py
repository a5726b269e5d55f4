"""`matching.register = true` wires each session's rigid transform into matching and records it.

The registration algorithm itself is checked against a known applied transform in
tests/matching/test_registration.py; here a stand-in returns a known 4 mm shift so the wiring is
tested
without minutes of optimisation."""
from __future__ import annotations

import numpy as np

from nifti_helpers import save_mask
from pipeline.matching import registration
from pipeline.cli import main
from pipeline.io.tsv import read_table

SHIFT_MM = 4.0


def make_series(folder):
    """Two lesions; the follow-up is stored 4 mm off in world x (as after a head movement)."""
    rows = ["subject\tsession\tmask\timage\tday"]
    for session, dx in (("1", 0.0), ("2", SHIFT_MM)):
        data = np.zeros((60, 40, 30), np.uint8)
        data[10:16, 10:16, 10:16] = 1
        data[40:46, 20:26, 15:21] = 1
        affine = np.eye(4)
        affine[0, 3] = dx
        save_mask(folder / f"m{session}.nii.gz", data, affine)
        save_mask(folder / f"i{session}.nii.gz", data.astype(np.int16) * 100, affine)
        rows.append(f"S\t{session}\tm{session}.nii.gz\ti{session}.nii.gz\t{int(session) * 30}")
    (folder / "m.tsv").write_text("\n".join(rows) + "\n")


def test_register_passes_transforms_and_writes_registration_tsv(tmp_path, monkeypatch, capsys):
    make_series(tmp_path)

    def known(fixed, fixed_affine, moving, moving_affine, **_):
        matrix = np.eye(4)
        matrix[0, 3] = -SHIFT_MM            # moving world -> fixed world
        return registration.RigidResult(matrix, -1.0, 0.99, 0.10, 5, "stand-in")

    monkeypatch.setattr(registration, "rigid_register", known)
    (tmp_path / "c.toml").write_text("[matching]\nregister = true\n")
    assert main(["run", str(tmp_path / "m.tsv"), "-o", str(tmp_path / "reg"), "--config",
                 str(tmp_path / "c.toml"), "-q"]) == 0
    table = read_table(tmp_path / "reg" / "registration.tsv")
    assert table[["session", "reference_session"]].values.tolist() == [["2", "1"]]
    assert float(table.matrix_ras[0].split()[3]) == -SHIFT_MM
    matches = read_table(tmp_path / "reg" / "matches.tsv")
    np.testing.assert_allclose(matches.centroid_distance_mm, 0.0, atol=1e-9)
    capsys.readouterr()
    assert main(["run", str(tmp_path / "m.tsv"), "-o", str(tmp_path / "plain"), "-q"]) == 0
    plain = read_table(tmp_path / "plain" / "matches.tsv")
    assert len(plain) == 2
    np.testing.assert_allclose(plain.centroid_distance_mm, SHIFT_MM)
    assert "shift" in capsys.readouterr().err.lower()   # misregistration warned without it
