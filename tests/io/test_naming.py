"""Labels -> file names through ``lesion-growth run``: one rule, and refusals instead of collisions.

Every way two different labels could reach the same file name is one class with a regression test:
a ``sub-``/``ses-`` prefix, characters a BIDS label cannot hold, letter case, Unicode
normalisation, sessions of one subject, BIDS folder names; plus labels too long for a file name
and labels without a letter or digit. Refused rows: one stderr line naming the manifest row and the
reason, a row in errors.tsv, exit status 1, every other subject processed (contract: exit status).
Masks are invented spheres (tests/cohort.py ``ball``).
"""
from __future__ import annotations

import errno
import os
import unicodedata
from pathlib import Path

import nibabel as nib
import numpy as np
import pytest
from cohort import ball
from nifti_helpers import save_mask
from cli_helpers import call, errors_of, write_manifest

from pipeline.io.names import MAX_LABELS_CHARS, NAME_MAX_BYTES, TEMPLATES, TEMPORARY_EXTRA
from pipeline.io.tsv import read_table

SHAPE, ZOOMS = (16, 16, 12), (1.0, 1.0, 1.0)
NFC = unicodedata.normalize("NFC", "Jos\u00e9")
NFD = unicodedata.normalize("NFD", "Jos\u00e9")
assert NFC != NFD                    # Unicode: U+00E9 decomposes to e + U+0301 (from memory)
LONG_OK = "L" * (MAX_LABELS_CHARS - 1)   # with session "1": exactly the limit
LONG_BAD = "M" * MAX_LABELS_CHARS        # with session "1": one character over it

#: subject -> (sessions, words of the reason it is refused for, or None when it is processed)
SUBJECTS = {
    "G": (("1", "2"), None),
    "sub-01": (("1", "2"), "differ only in a 'sub-' prefix"),
    "01": (("1", "2"), "differ only in a 'sub-' prefix"),
    "P-1": (("1", "2"), "ASCII letters and digits"),
    "P1": (("1", "2"), "ASCII letters and digits"),
    "c": (("1", "2"), "letter case"),
    "C": (("1", "2"), "letter case"),
    NFC: (("1", "2"), "Unicode normalisation"),
    NFD: (("1", "2"), "Unicode normalisation"),
    "--": (("1", "2"), "no ASCII letter or digit"),
    # named the same track images under the old rule (sub-A_ses-1_ses-2...): now kept apart
    "A_ses-1": (("2", "3"), None),
    "A": (("1_ses-2", "1_ses-3"), None),
    LONG_OK: (("1", "2"), None),
    LONG_BAD: (("1", "2"), f"more than the {MAX_LABELS_CHARS} allowed"),
}


@pytest.fixture(scope="module")
def named(tmp_path_factory):
    """One run over every class: each subject's sphere has its own size, so a track image
    shows whose lesion it holds."""
    folder = tmp_path_factory.mktemp("naming")
    rows, sizes = [], {}
    for n, (subject, (sessions, _)) in enumerate(SUBJECTS.items()):
        sizes[subject] = 30.0 + 15 * n
        for s, session in enumerate(sessions):
            name = f"m{n}_{s}.nii.gz"
            mask = ball(SHAPE, (8, 8, 6), sizes[subject] * (1 + 0.2 * s), ZOOMS)
            save_mask(folder / name, mask.astype(np.uint8), np.eye(4))
            rows.append((subject, session, name, f"2024-0{s + 1}-01"))
    # one subject, two spellings of one session on different days: both rows refused
    for s, (session, date) in enumerate((("ses-1", "2024-01-01"), ("1", "2024-02-01"),
                                         ("2", "2024-03-01"))):
        save_mask(folder / f"k{s}.nii.gz", ball(SHAPE, (8, 8, 6), 40.0, ZOOMS).astype(np.uint8),
                  np.eye(4))
        rows.append(("K", session, f"k{s}.nii.gz", date))
    manifest = write_manifest(folder, rows)
    out = folder / "out"
    code, err = call(["run", manifest, "-o", out, "-q"])
    return out, code, err, rows


def _rows_of(rows, subject):
    return [i + 2 for i, r in enumerate(rows) if r[0] == subject]    # header is line 1


@pytest.mark.parametrize("subject", [s for s, (_, why) in SUBJECTS.items() if why])
def test_colliding_or_unnameable_labels_are_refused(named, subject):
    out, code, err, rows = named
    assert code == 1
    sessions, words = SUBJECTS[subject]
    mine = errors_of(out)
    mine = mine[mine.subject == subject]
    assert sorted(mine.session) == sorted(sessions)
    for reason in mine.reason:
        assert words in reason and "\n" not in reason, reason
    for line_no in _rows_of(rows, subject):
        lines = [x for x in err.splitlines() if f"manifest.tsv row {line_no} " in x]
        assert len(lines) == 1 and words in lines[0] and lines[0].startswith("error: sub ")
    lesions = read_table(out / "lesions.tsv")
    assert subject not in set(lesions.subject)


def test_sessions_of_one_subject_that_name_the_same_files_are_refused(named):
    out, _, err, _ = named
    mine = errors_of(out).query("subject == 'K'")
    assert sorted(mine.session) == ["1", "ses-1"]
    assert all("differ only in a 'ses-' prefix" in r for r in mine.reason)
    longitudinal = read_table(out / "longitudinal.tsv")
    assert longitudinal.query("subject == 'K'").session.tolist() == ["2"]


def test_labels_once_colliding_now_name_separate_files_holding_their_own_lesion(named):
    # Reference: BIDS specification, entities: a label is alphanumeric and '_'/'-' separate
    # entities, so file names built from the alphanumeric part alone parse back unambiguously.
    out, *_ = named
    lesions = read_table(out / "lesions.tsv")
    expected = {("A_ses-1", "2"): "sub-Ases1_ses-2", ("A_ses-1", "3"): "sub-Ases1_ses-3",
                ("A", "1_ses-2"): "sub-A_ses-1ses2", ("A", "1_ses-3"): "sub-A_ses-1ses3",
                ("G", "2"): "sub-G_ses-2", (LONG_OK, "2"): f"sub-{LONG_OK}_ses-2"}
    masks = read_table(out / "masks.tsv")
    for (subject, session), stem in expected.items():
        image = np.asarray(nib.load(out / "tracks" / f"{stem}_tracks.nii.gz").dataobj)
        named_in = masks[(masks.subject == subject) & (masks.session == session)].track_image
        assert named_in.tolist() == [f"tracks/{stem}_tracks.nii.gz"]
        row = lesions[(lesions.subject == subject) & (lesions.session == session)]
        assert int((image > 0).sum()) == int(row.voxels.sum()) > 0, (subject, session)
    # every refused subject wrote no track image of its own, nor one under a shared name
    names = {p.name for p in (out / "tracks").iterdir()}
    assert not any(n.startswith(("sub-01_", "sub-P1_", "sub-c_", "sub-C_", "sub-Jose_",
                                 "sub-M")) for n in names)
    assert (out / "report.html").exists()
    fitted = set(read_table(out / "longitudinal.tsv").subject)
    assert {"G", "A", "A_ses-1", LONG_OK} <= fitted


def test_label_length_limit_is_what_the_file_system_allows(tmp_path):
    # Reference: 255 bytes is the usual longest file name (NAME_MAX of ext4, XFS, tmpfs; common
    # practice): the file system of the test folder itself is asked and tried.
    if os.pathconf(tmp_path, "PC_NAME_MAX") != NAME_MAX_BYTES:
        pytest.skip("the test folder's file system does not have 255-byte file names")
    longest = max(TEMPLATES, key=len)
    stem = longest.format(s="a" * (MAX_LABELS_CHARS - 1), t="1")
    fits = "." + stem.replace(".", ".12345678.", 1)      # as an atomic write names it
    assert len(fits) == len(stem) + TEMPORARY_EXTRA == NAME_MAX_BYTES
    (tmp_path / fits).write_bytes(b"")
    with pytest.raises(OSError) as too_long:
        (tmp_path / ("a" + fits)).write_bytes(b"")
    assert too_long.value.errno == errno.ENAMETOOLONG


def test_bids_folder_names_case_misnamed_files_and_missing_sessions_file(tmp_path):
    # Reference: BIDS specification: sub-<label>/ses-<label>/anat/sub-<label>_ses-<label>_...;
    # a file's entities repeat its folders; dates come from sub-<label>_sessions.tsv.
    root = tmp_path / "bids"
    layout = {"G": ("1", "2"), "a": ("1", "2"), "A": ("1", "2"), "M": ("1", "2"), "N": ("1",)}
    for subject, sessions in layout.items():
        for session in sessions:
            anat = root / f"sub-{subject}" / f"ses-{session}" / "anat"
            anat.mkdir(parents=True)
            named_as = "2" if (subject, session) == ("M", "1") else session   # misnamed file
            save_mask(anat / f"sub-{subject}_ses-{named_as}_mask.nii.gz",
                      ball(SHAPE, (8, 8, 6), 60.0, ZOOMS).astype(np.uint8), np.eye(4))
        if subject != "N":
            (root / f"sub-{subject}" / f"sub-{subject}_sessions.tsv").write_text(
                "session_id\tacq_time\nses-1\t2024-01-01\nses-2\t2024-02-01\n")
    if not (root / "sub-a").exists() or len(list(root.iterdir())) < len(layout):
        pytest.skip("case-insensitive file system: sub-a and sub-A are one folder here")
    out = tmp_path / "out"
    code, err = call(["run", root, "-o", out, "-q"])
    assert code == 1
    errors = errors_of(out)
    by_subject = {s: errors[errors.subject == s] for s in layout}
    for subject in ("a", "A"):
        assert sorted(by_subject[subject].session) == ["1", "2"]
        assert all("letter case" in r for r in by_subject[subject].reason)
    assert by_subject["M"].session.tolist() == ["1"]
    assert "misnamed" in by_subject["M"].reason.iloc[0]
    assert "sub-N/sub-N_sessions.tsv not found" in by_subject["N"].reason.iloc[0]
    assert by_subject["G"].empty
    for row in errors.itertuples():
        assert row.reason.count(row.path) == 1, row.reason       # the path once, not twice
        assert len([x for x in err.splitlines() if row.path in x]) == 1
    assert read_table(out / "longitudinal.tsv").query("subject == 'M'").session.tolist() == ["2"]


def test_readme_states_the_label_limit_the_code_applies():
    readme = (Path(__file__).resolve().parents[2] / "README.md").read_text(encoding="utf-8")
    assert f"longer than {MAX_LABELS_CHARS} characters" in " ".join(readme.split())
