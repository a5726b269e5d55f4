"""Parts of the report checked against outside references: the PNG encoder against Pillow's
decoder, the image reader and the RAS turn against nibabel, lesion centres from lesions.tsv
against the track images, and the panel cache and review queue on an invented OUT folder."""
from __future__ import annotations

import io
import json
import shutil

import nibabel as nib
import numpy as np
import pytest
from PIL import Image

from pipeline.io.nifti import load_image
from pipeline.io.tsv import read_table
from pipeline.report.build import write_report
from pipeline.report.data import (ScanCache, _track_centres, canonical, component_lesions,
                                  lesion_centres, load_inputs)
from pipeline.report.flags import FLAG_KINDS
from pipeline.report.pages import environment
from pipeline.report.png import encode_png, panel_rgb
from tests.report_fixtures import build_report_folder


@pytest.fixture(scope="module")
def fixture(tmp_path_factory):
    return build_report_folder(tmp_path_factory.mktemp("parts"))


@pytest.mark.parametrize("shape", [(1, 1), (7, 13), (64, 3)])
def test_png_encoder_round_trips_through_pillow(shape):
    rgb = np.random.default_rng(3).integers(0, 256, (*shape, 3), dtype=np.uint8)
    with Image.open(io.BytesIO(encode_png(rgb))) as image:   # Reference: Pillow's PNG decoder
        image.load()
        assert image.mode == "RGB" and image.size == (shape[1], shape[0])
        np.testing.assert_array_equal(np.asarray(image), rgb)


def test_panel_puts_right_on_the_right_and_anterior_up():
    # Reference: RAS+ (NIfTI-1 world space): axis 0 grows to the subject's right, axis 1 to the
    # front; radiology screens show R on the right in this (neurological) layout by choice.
    track = np.zeros((9, 9), np.int16)
    track[7, 1] = 2                      # right and posterior corner: a one-voxel other lesion
    image = np.zeros((9, 9), np.float32)
    image[8, 8] = 1.0                    # right and anterior corner: bright
    rgb = panel_rgb(track, image, (0.0, 1.0), 1, scale=1)
    assert tuple(rgb[0, 8]) == (255, 255, 255)        # top right = x 8, y 8
    assert tuple(rgb[0, 0]) == (0, 0, 0)
    assert rgb[7, 7].tolist() != [0, 0, 0]             # row 7 from the top = y 1; col 7 = x 7


def test_image_reader_and_canonical_turn_agree_with_nibabel(tmp_path):
    rng = np.random.default_rng(5)
    data = rng.normal(100, 20, (6, 5, 4)).astype(np.int16)
    affine = np.array([[0.0, 0.0, -2.0, 30.0], [-1.5, 0.0, 0.0, 10.0], [0.0, 1.0, 0.0, -5.0],
                       [0.0, 0.0, 0.0, 1.0]])
    image = nib.Nifti1Image(data, affine)
    image.header.set_slope_inter(0.5, 3.0)
    path = tmp_path / "image.nii.gz"
    nib.save(image, str(path))
    read, read_affine = load_image(path)
    reference = nib.load(str(path))                     # Reference: nibabel's reader
    np.testing.assert_allclose(read, reference.get_fdata(), rtol=1e-6)
    np.testing.assert_allclose(read_affine, reference.affine)
    turned, turned_affine = canonical(read, read_affine)
    closest = nib.as_closest_canonical(reference)      # Reference: nibabel's RAS turn
    np.testing.assert_allclose(turned, closest.get_fdata(), rtol=1e-6)
    np.testing.assert_allclose(turned_affine, closest.affine)


def test_lesion_centres_from_the_table_match_the_track_images(fixture):
    # The table's centroids (stage 1, from the masks) and the track images' voxels must put
    # each lesion in the same place: the track images are the masks relabelled.
    inputs = load_inputs(fixture.out)
    for subject in ("P01", "P02"):
        cache = ScanCache(inputs, subject)
        lesions = inputs.of_subject("lesions.tsv", subject)
        mapping = component_lesions(inputs.of_subject("lesion_components.tsv", subject))
        sessions = sorted(lesions["session"].unique())
        for lesion in sorted(set(mapping.values())):
            own = lesions[[mapping.get((str(s), int(c))) == lesion
                           for s, c in zip(lesions["session"], lesions["component"])]]
            table, radius = lesion_centres(cache, lesion, sessions, own)
            tracks, radius_tracks = _track_centres(cache, lesion, sessions)
            assert set(table) == set(tracks) and table
            for session in table:
                np.testing.assert_allclose(table[session], tracks[session], atol=1e-6)
            assert radius == pytest.approx(radius_tracks, rel=1e-9)


def test_a_rebuild_redraws_only_the_panels_that_changed(fixture, tmp_path):
    out = tmp_path / "out"
    shutil.copytree(fixture.out, out)
    write_report(out)
    store = out / ".cache" / "report"
    first = {p.name for p in store.glob("*.png")}
    write_report(out)
    assert {p.name for p in store.glob("*.png")} == first        # nothing redrawn
    track = out / "tracks" / "sub-P02_ses-03_tracks.nii.gz"      # a correction changes one
    image = nib.load(str(track))                                 # session's track image
    labels = np.asanyarray(image.dataobj).copy()
    labels[labels == 2] = 0
    nib.save(nib.Nifti1Image(labels, image.affine, image.header), str(track))
    write_report(out)
    second = {p.name for p in store.glob("*.png")}
    assert 0 < len(second - first) <= 2          # P02's two lesions at that session only
    assert len(first - second) == len(second - first)            # their old panels are gone


def test_queue_lists_every_flag_in_review_order(fixture, tmp_path):
    out = tmp_path / "out"
    shutil.copytree(fixture.out, out)
    write_report(out)
    text = (out / "report" / "queue.js").read_text(encoding="utf-8")
    queue = json.loads(text.split("=", 1)[1].strip().rstrip(";"))
    kinds = [item["k"] for item in queue["items"]]
    assert kinds == sorted(kinds, key=FLAG_KINDS.index)
    index = (out / "report.html").read_text(encoding="utf-8")
    assert index.count("<li class=\"flag\">") == len(queue["items"])
    for item in queue["items"]:
        page, ident = item["h"].split("#")
        target = (out / "report" / page).resolve()
        assert f'id="{ident}"' in target.read_text(encoding="utf-8"), item


def test_subjects_with_flags_come_first_in_the_index(fixture, tmp_path):
    out = tmp_path / "out"
    shutil.copytree(fixture.out, out)
    index = write_report(out).read_text(encoding="utf-8")
    listed = index[index.index('id="subjects"'):]
    order = [s for s in ("P01", "P02", "P03") if f"subject-{s}.html" in listed]
    positions = sorted(order, key=lambda s: listed.index(f"subject-{s}.html"))
    assert positions[-1] == "P03"        # P03 has no lesion and nothing flagged


def test_templates_escape_every_value():
    # Reference: Jinja2's autoescaping (HTML-escapes &, <, >, " and ').
    text = environment().from_string("<p title='{{ v }}'>{{ v }}</p>").render(v="<b>'&\"")
    assert text == "<p title='&lt;b&gt;&#39;&amp;&#34;'>&lt;b&gt;&#39;&amp;&#34;</p>"


def test_fixture_lesions_table_has_centroids(fixture):
    lesions = read_table(fixture.out / "lesions.tsv")
    assert {"centroid_x_mm", "centroid_y_mm", "centroid_z_mm"} <= set(lesions.columns)


def test_an_unchanged_subject_is_rebuilt_without_reading_an_image(fixture, tmp_path,
                                                                   monkeypatch):
    out = tmp_path / "out"
    shutil.copytree(fixture.out, out)
    first = write_report(out).read_text(encoding="utf-8")
    pages = {p.name: p.read_text(encoding="utf-8") for p in (out / "report").glob("*.html")}

    def no_reading(self, session):
        raise AssertionError(f"read the track image of {self.subject} {session}")
    monkeypatch.setattr(ScanCache, "track", no_reading)
    assert write_report(out).read_text(encoding="utf-8") == first
    assert {p.name: p.read_text(encoding="utf-8")
            for p in (out / "report").glob("*.html")} == pages   # the same pages, unread


def test_the_same_out_gives_the_same_report_files_wherever_it_lies(fixture, tmp_path):
    # Common practice: reproducible outputs; the pages carry no machine path or folder id.
    copies = []
    for name in ("a", "deeper/b"):
        out = tmp_path / name / "out"
        shutil.copytree(fixture.out, out)
        write_report(out)
        copies.append({p.relative_to(out).as_posix(): p.read_bytes()
                       for p in [out / "report.html", *sorted((out / "report").iterdir())]})
    assert copies[0] == copies[1]
    assert all(str(tmp_path).encode() not in data for data in copies[0].values())
