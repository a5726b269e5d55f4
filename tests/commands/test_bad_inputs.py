"""Bad input: one line naming file and reason, an errors.tsv row, exit status 1, good rows kept.

The cases follow the issue's list; expectations are the rules of docs/outputs.md."""
from __future__ import annotations

import gzip

import nibabel as nib
import numpy as np
import pytest
from nifti_helpers import save_mask

from pipeline.cli import main
from pipeline.io.tsv import read_table

GOOD = np.zeros((12, 12, 8), np.uint8)
GOOD[3:6, 3:6, 2:4] = 1


def write_manifest(folder, rows, header=("subject", "session", "mask", "date")):
    lines = ["\t".join(header)] + ["\t".join(r) for r in rows]
    path = folder / "manifest.tsv"
    path.write_text("\n".join(lines) + "\n")
    return path


def good_file(folder, name="good.nii.gz"):
    return save_mask(folder / name, GOOD, np.eye(4))


def bad_files(folder):
    """name -> (file name, expected words in the reason)."""
    good = good_file(folder).read_bytes()
    (folder / "empty.nii.gz").write_bytes(b"")
    (folder / "truncated.nii.gz").write_bytes(good[: len(good) // 2])
    (folder / "garbage.nii.gz").write_bytes(gzip.compress(b"not a nifti file at all" * 3))
    (folder / "text.nii.gz").write_bytes(gzip.compress(b"not a nifti file at all" * 30))
    (folder / "notgzip.nii.gz").write_bytes(b"\x00" * 400)
    lying = nib.Nifti1Image(GOOD, np.eye(4))
    lying.header.set_qform(np.eye(4), 1)
    raw = bytearray(lying.header.binaryblock) + bytes(4) + GOOD.tobytes(order="F")
    header = nib.Nifti1Header.from_fileobj(__import__("io").BytesIO(bytes(raw[:348])))
    header["dim"][1:4] = (120, 120, 80)           # declares 100x more data than present
    raw[:348] = header.binaryblock
    (folder / "lying.nii").write_bytes(bytes(raw))
    save_mask(folder / "float.nii.gz", GOOD * 0.3, np.eye(4), dtype=np.float32)
    save_mask(folder / "four_d.nii.gz", np.stack([GOOD, GOOD], -1), np.eye(4))
    huge = nib.Nifti1Header()
    huge.set_data_shape((30000, 30000, 30000))
    huge.set_data_dtype(np.uint8)
    huge.set_qform(np.eye(4), 1)
    (folder / "huge.nii").write_bytes(huge.binaryblock + bytes(4))
    (folder / "sub").mkdir()
    return {
        "missing": ("missing.nii.gz", "file not found"),
        "empty": ("empty.nii.gz", "file is empty"),
        "truncated": ("truncated.nii.gz", "truncated"),
        "garbage": ("garbage.nii.gz", "too short to hold a NIfTI header"),
        "text": ("text.nii.gz", "not a NIfTI file"),
        "notgzip": ("notgzip.nii.gz", "gzip data is corrupt"),
        "lying": ("lying.nii", "file is truncated: header declares"),
        "float": ("float.nii.gz", "labels must be integers"),
        "four_d": ("four_d.nii.gz", "mask has 2 volumes"),
        "huge": ("huge.nii", "MB in memory"),
        "folder": ("sub", "is a folder"),
    }


def run_cli(args, capsys):
    code = main(list(map(str, args)))
    return code, capsys.readouterr().err


def test_each_bad_scan_is_reported_and_good_rows_kept(tmp_path, capsys):
    cases = bad_files(tmp_path)
    rows = [("G", "1", "good.nii.gz", "2024-01-01"), ("G", "2", "good.nii.gz", "2024-02-01")]
    rows += [(name, "1", file, "2024-01-01") for name, (file, _) in cases.items()]
    manifest = write_manifest(tmp_path, rows)
    code, err = run_cli(["volumes", manifest, "-o", tmp_path / "out"], capsys)
    assert code == 1
    errors = read_table(tmp_path / "out" / "errors.tsv")
    assert sorted(errors.subject) == sorted(cases)
    for name, (file, words) in cases.items():
        reason = errors.reason[errors.subject == name].iloc[0]
        assert words in reason and reason.startswith(file + ":"), (name, reason)
        line = [x for x in err.splitlines() if f"sub {name} " in x]
        assert len(line) == 1 and words in line[0]
    lesions = read_table(tmp_path / "out" / "lesions.tsv")
    assert lesions.subject.tolist() == ["G", "G"] and lesions.voxels.tolist() == [18, 18]
    assert lesions.day.tolist() == [0.0, 31.0]


def test_row_problems(tmp_path, capsys):
    good_file(tmp_path)
    save_mask(tmp_path / "two.nii.gz", GOOD * 2, np.eye(4))
    rows = [("A", "1", "good.nii.gz", "2024-01-01"), ("A", "2", "good.nii.gz", "2024-13-01"),
            ("B", "1", "good.nii.gz", "2024-01-01"), ("B", "1", "good.nii.gz", "2024-02-01"),
            ("C", "1", "good.nii.gz", "2024-01-05"), ("C", "2", "good.nii.gz", "2024-01-05"),
            ("D", "1", "two.nii.gz", "2024-01-01"), ("E", "1", "good.nii.gz", "2024-03-01")]
    manifest = write_manifest(tmp_path, [r + ("1",) for r in rows],
                              header=("subject", "session", "mask", "date", "labels"))
    code, err = run_cli(["volumes", manifest, "-o", tmp_path / "out"], capsys)
    assert code == 1
    errors = read_table(tmp_path / "out" / "errors.tsv")
    reasons = dict(zip(errors.subject + "/" + errors.session, errors.reason))
    assert "not an ISO 8601 date" in reasons["A/2"]
    assert (errors.subject == "B").sum() == 2 and "more than once" in reasons["B/1"]
    assert "same day" in reasons["C/1"] and "same day" in reasons["C/2"]
    assert "label values (1,) asked for" in reasons["D/1"]
    lesions = read_table(tmp_path / "out" / "lesions.tsv")
    assert sorted(set(lesions.subject)) == ["A", "E"]


@pytest.mark.parametrize("content,words", [
    ("subject\tsession\tmask\tdate\n", "no rows"),
    ("subject\tmask\tdate\nA\tm.nii\t2024-01-01\n", "lacks column(s) session"),
    ("subject\tsession\tmask\nA\t1\tm.nii\n", "date or day"),
    # found by tests/commands/test_fuzz.py: two headers that differ only in spaces
    ("subject\tsession\tmask\tdate\t \t\xa0\nA\t1\tm.nii\t2024-01-01\t\t\n",
     "more than once"),
])
def test_whole_manifest_problems_exit_2(tmp_path, capsys, content, words):
    (tmp_path / "m.tsv").write_text(content)
    code, err = run_cli(["volumes", tmp_path / "m.tsv", "-o", tmp_path / "out"], capsys)
    assert code == 2 and words in err and len(err.strip().splitlines()) == 1
    assert not (tmp_path / "out" / "lesions.tsv").exists()


def test_unknown_config_key_exits_2_before_work(tmp_path, capsys):
    good_file(tmp_path)
    manifest = write_manifest(tmp_path, [("A", "1", "good.nii.gz", "2024-01-01")])
    (tmp_path / "c.toml").write_text("[volumes]\nconectivity = 6\n")
    code, err = run_cli(["volumes", manifest, "-o", tmp_path / "out", "--config",
                         tmp_path / "c.toml"], capsys)
    assert code == 2 and "unknown setting [volumes] conectivity" in err
    assert not (tmp_path / "out").exists()


def test_all_zero_mask_is_valid_and_recorded(tmp_path, capsys):
    save_mask(tmp_path / "zero.nii.gz", np.zeros((5, 5, 5), np.uint8), np.eye(4))
    good_file(tmp_path)
    manifest = write_manifest(tmp_path, [("A", "1", "good.nii.gz", "2024-01-01"),
                                         ("A", "2", "zero.nii.gz", "2024-02-01")])
    code, _ = run_cli(["volumes", manifest, "-o", tmp_path / "out"], capsys)
    assert code == 0
    masks = read_table(tmp_path / "out" / "masks.tsv")
    assert masks.components.tolist() == [1, 0]
    assert len(read_table(tmp_path / "out" / "errors.tsv")) == 0


def test_check_reports_and_writes_nothing(tmp_path, capsys):
    good_file(tmp_path)
    manifest = write_manifest(tmp_path, [("A", "1", "good.nii.gz", "2024-01-01"),
                                         ("A", "2", "missing.nii.gz", "2024-02-01")])
    before = sorted(p.name for p in tmp_path.iterdir())
    code = main(["check", str(manifest)])
    out = capsys.readouterr().out
    assert code == 1 and "missing.nii.gz: file not found" in out
    assert sorted(p.name for p in tmp_path.iterdir()) == before


def _decoded_or_reason(raw, needed, module):
    """The decoded bytes, or 'truncated'/'corrupt' from the one-line error."""
    from pipeline.errors import InputError
    from pipeline.io.nifti import _decompress_into

    try:
        return bytes(_decompress_into(raw, needed, "m.nii.gz", module))
    except InputError as exc:
        assert "\n" not in str(exc) and str(exc).startswith("m.nii.gz: gzip data is ")
        return "truncated" if "truncated" in str(exc) else "corrupt"


@pytest.mark.parametrize("damage", ["none", "half", "trailer cut", "crc flipped", "body flipped",
                                    "longer than declared", "longer, body flipped",
                                    "longer, crc flipped"])
def test_both_gzip_decoders_agree_with_the_standard_library(damage):
    # Reference: Python's gzip module (RFC 1952 reader of the standard library): what it decodes
    # we decode byte for byte; what it refuses we refuse (one line, truncated or corrupt), with
    # the ISA-L decoder (python-isal, used by default) and the zlib fallback alike.
    import zlib

    from isal import isal_zlib

    data = np.random.default_rng(7).integers(0, 4, 300_000).astype(np.uint8).tobytes()
    raw = bytearray(gzip.compress(data, mtime=0))
    needed = len(data)
    if damage == "half":
        raw = raw[: len(raw) // 2]
    elif damage == "trailer cut":
        raw = raw[:-4]
    elif damage == "crc flipped":
        raw[-6] ^= 0xFF
    elif damage == "body flipped":
        raw[len(raw) // 2] ^= 0x10
    if damage.startswith("longer"):        # the image ends before the stream does
        needed -= 1000
    if damage == "longer, body flipped":
        raw[len(raw) // 3] ^= 0x10
    elif damage == "longer, crc flipped":
        raw[-6] ^= 0xFF
    raw = bytes(raw)
    try:
        expected = gzip.decompress(raw)[:needed]
    except (EOFError, OSError, zlib.error) as exc:
        expected = "truncated" if isinstance(exc, EOFError) else "corrupt"
    for module in (isal_zlib, zlib):
        assert _decoded_or_reason(raw, needed, module) == expected, (damage, module.__name__)


def test_messages_show_the_value_that_was_refused(tmp_path):
    # A float label 0.99999 is not an integer; the message must show it as stored, not rounded
    # to "1" (a reader would not see why 1 was refused). A tiny memory limit is shown as set.
    from pipeline.errors import InputError
    from pipeline.io.image import check_memory
    from pipeline.voxels import integer_labels
    from pipeline.settings import VolumeSettings

    with pytest.raises(InputError, match=r"with value 0\.99999 "):
        integer_labels(np.array([0.0, 0.99999], np.float32), None, None, name="m.nii")
    with pytest.raises(InputError, match=r"would need 0\.00763 MB in memory \(limit 0\.001 MB"):
        check_memory((20, 20, 20), 1, "m.nii", VolumeSettings(max_memory_mb=0.001))
