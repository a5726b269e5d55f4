"""The QA report: a cohort index and one page per subject, built from an invented OUT folder.

The pages are parsed with the standard library's html.parser; images are decoded and read back
with Pillow (an independent PNG reader).
"""
from __future__ import annotations

import base64
import hashlib
import io
import math
import re
import shutil
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from PIL import Image
from scipy.integrate import solve_ivp

from pipeline import DISCLAIMER
from pipeline.report.build import write_report
from pipeline.report.data import component_lesions, load_inputs, subject_rows
from pipeline.report.figures import power_curve
from pipeline.report.png import PNG_SIGNATURE
from pipeline.settings import ReportSettings
from pipeline.io.tsv import read_table, write_table
from tests.report_fixtures import ReportFixture, build_report_folder

VOID = {"area", "base", "br", "col", "embed", "hr", "img", "input", "link", "meta", "source",
        "track", "wbr"}


class Page(HTMLParser):
    """Elements with their attributes, and the text inside every element that has an id."""

    def __init__(self, text: str) -> None:
        super().__init__(convert_charrefs=True)
        self.elements: list[tuple[str, dict[str, str]]] = []
        self.text_by_id: dict[str, list[str]] = {}
        self.order: list[str] = []            # ids and classes in document order
        self.links_in: dict[str, list[str]] = {}  # id -> hrefs of the links inside it
        self._stack: list[tuple[str, str | None]] = []
        self._skip = 0
        self.feed(text)
        self.close()

    def handle_starttag(self, tag, attrs):
        attributes = {k: (v or "") for k, v in attrs}
        self.elements.append((tag, attributes))
        self.order.append(attributes.get("id") or attributes.get("class") or tag)
        if tag == "a" and "href" in attributes:
            for _, ident in self._stack:
                if ident is not None:
                    self.links_in.setdefault(ident, []).append(attributes["href"])
        if tag in ("script", "style"):
            self._skip += 1
        if tag in VOID:
            return
        ident = attributes.get("id")
        if ident is not None:
            self.text_by_id.setdefault(ident, [])
        self._stack.append((tag, ident))

    def handle_endtag(self, tag):
        if tag in ("script", "style"):
            self._skip -= 1
        while self._stack:
            open_tag, _ = self._stack.pop()
            if open_tag == tag:
                break

    def handle_data(self, data):
        if self._skip:
            return
        for _, ident in self._stack:
            if ident is not None:
                self.text_by_id[ident].append(data)

    def text(self, ident: str) -> str:
        return re.sub(r"\s+", " ", " ".join(self.text_by_id[ident])).strip()

    def find(self, tag: str, **attrs: str) -> list[dict[str, str]]:
        return [a for t, a in self.elements
                if t == tag and all(a.get(k.rstrip("_")) == v for k, v in attrs.items())]


class Site:
    """Every page of one report (report.html and report/*.html) read as one: ids, elements and
    links of all pages; ``order`` is the index page's; ``links_in`` keeps the fragment (#id) of
    each link, ``targets`` the (file, id) it points to."""

    def __init__(self, index: Path) -> None:
        self.index = index
        self.out = index.parent
        files = [index] + sorted((self.out / "report").glob("*.html"))
        self.pages = {p: Page(p.read_text(encoding="utf-8")) for p in files}
        self.order = self.pages[index].order
        self.elements = [e for page in self.pages.values() for e in page.elements]
        self.text_by_id: dict[str, list[str]] = {}
        self.links_in: dict[str, list[str]] = {}
        self.targets: list[tuple[Path, str, str]] = []    # (file, linked file, id)
        for path, page in self.pages.items():
            for ident, texts in page.text_by_id.items():
                self.text_by_id.setdefault(ident, []).extend(texts)
            for ident, hrefs in page.links_in.items():
                self.links_in.setdefault(ident, []).extend(
                    "#" + h.split("#", 1)[1] if "#" in h else h for h in hrefs)
            for tag, attrs in page.elements:
                if tag == "a" and "href" in attrs:
                    target, _, ident = attrs["href"].partition("#")
                    linked = (path.parent / target).resolve() if target else path.resolve()
                    self.targets.append((path, linked, ident))

    def text(self, ident: str) -> str:
        return re.sub(r"\s+", " ", " ".join(self.text_by_id[ident])).strip()

    def find(self, tag: str, **attrs: str) -> list[dict[str, str]]:
        return [a for page in self.pages.values() for a in page.find(tag, **attrs)]

    def page_of(self, ident: str) -> Page:
        return next(p for p in self.pages.values() if ident in p.text_by_id)


@pytest.fixture(scope="module")
def built(tmp_path_factory) -> tuple[ReportFixture, str, Site]:
    fixture = build_report_folder(tmp_path_factory.mktemp("report"))
    path = write_report(fixture.out)
    text = path.read_text(encoding="utf-8")
    return fixture, text, Site(path)


def _copy(fixture: ReportFixture, tmp_path: Path) -> Path:
    out = tmp_path / "out"
    shutil.copytree(fixture.out, out)
    (out / "report.html").unlink(missing_ok=True)
    return out


def _digests(folder: Path) -> dict[str, str]:
    """Checksums of the stages' outputs (the report's own files and cache left out)."""
    return {str(p.relative_to(folder)): hashlib.sha256(p.read_bytes()).hexdigest()
            for p in sorted(folder.rglob("*")) if p.is_file() and p.name != "report.html"
            and p.relative_to(folder).parts[0] not in ("report", ".cache")}


def test_report_is_written_atomically_and_inputs_are_untouched(built, tmp_path):
    fixture, _, _ = built
    out = _copy(fixture, tmp_path)
    before = _digests(out)
    path = write_report(out)
    assert path == out / "report.html" and path.is_file()
    assert _digests(out) == before  # reads OUT, never rewrites a stage's output
    # no temporary file of an atomic write is left behind (only the panel cache is hidden)
    assert sorted(p.name for p in out.iterdir() if p.name.startswith(".")) == [".cache"]
    for folder in (out / "report", out / ".cache" / "report"):
        assert [p.name for p in folder.iterdir() if p.name.startswith(".")] == []
    pages = sorted(p.name for p in (out / "report").glob("subject-*.html"))
    assert pages == ["subject-P01.html", "subject-P02.html", "subject-P03.html"]


def test_no_external_references(built):
    _, _, site = built
    # Common practice: an offline report loads nothing from elsewhere: in-page (#) links, data:
    # URIs and relative links to files of the report itself, which must exist.
    for path, page in site.pages.items():
        for tag, attrs in page.elements:
            assert tag not in ("iframe", "object", "embed", "base", "frame")
            for name in ("src", "href", "action", "formaction", "srcset", "poster", "data"):
                if name in attrs:
                    value = attrs[name]
                    if value.startswith("#") or value.startswith("data:"):
                        continue
                    assert ":" not in value.split("#")[0] and not value.startswith("/"), value
                    target = (path.parent / value.split("#")[0]).resolve()
                    assert target.is_file(), (path.name, value)
                    assert target.is_relative_to(site.out.resolve())
    for path in [site.index] + sorted((site.out / "report").iterdir()):
        lowered = path.read_text(encoding="utf-8").lower()
        assert "http://" not in lowered and "https://" not in lowered
        if path.suffix != ".js":   # the script's URL(...) are blob: and page addresses
            assert re.search(r"(?<![a-z])url\(", lowered) is None  # no CSS url(...)
        assert "@import" not in lowered and "fetch(" not in lowered
        assert "xmlhttprequest" not in lowered


def test_every_image_is_an_embedded_png_that_decodes(built):
    fixture, _, site = built
    images = site.find("img")
    longitudinal = read_table(fixture.out / "longitudinal.tsv")
    # one panel per session of every lesion of P01 and P02 (P03 has no lesion); placeholders
    # ("no slice") stand where a session has no track slice
    placeholders = sum(1 for _, a in site.elements if a.get("class") == "noslice")
    assert len(images) + placeholders == len(longitudinal) and len(images) >= 10
    for attrs in images:
        prefix = "data:image/png;base64,"
        assert attrs["src"].startswith(prefix)
        data = base64.b64decode(attrs["src"][len(prefix):], validate=True)
        # Reference: PNG specification (W3C / ISO/IEC 15948), section 5.2: the 8-byte signature.
        assert data[:8] == PNG_SIGNATURE
        with Image.open(io.BytesIO(data)) as image:  # Reference: Pillow's PNG decoder
            image.load()
            assert image.format == "PNG" and image.width > 20 and image.height > 20
            assert (image.width, image.height) == (int(attrs["width"]), int(attrs["height"]))
            pixels = np.asarray(image.convert("RGB")).reshape(-1, 3)
            assert len(np.unique(pixels, axis=0)) > 2  # not a blank canvas
        assert attrs.get("alt")


def test_timelines_are_svg_with_a_titled_point_per_session(built):
    fixture, _, site = built
    longitudinal = read_table(fixture.out / "longitudinal.tsv")
    for subject in ("P01", "P02"):
        page = site.pages[site.out / "report" / f"subject-{subject}.html"]
        titles = [t for t in page.text_by_id if t == "tl-title"]
        assert titles and f"Lesion volumes of {subject} over time" in page.text("tl-title")
        points = [a for t, a in page.elements if t == "g" and a.get("class") == "pt"]
        assert len(points) == int((longitudinal["subject"] == subject).sum())
        assert all(a.get("tabindex") == "0" for a in points)   # reachable with the keyboard


def test_caution_banner_comes_first(built):
    _, _, page = built
    assert page.text("caution").startswith("Caution. " + DISCLAIMER)
    for each in page.pages.values():    # every page carries the caution first
        assert each.text("caution") == "Caution. " + DISCLAIMER
        assert each.order.index("caution") < each.order.index("h1")
    first_heading = page.order.index("h1")
    assert page.order.index("caution") < first_heading < page.order.index("summary")
    assert page.order.index("flagged") < page.order.index("summary")  # flagged items first


def test_known_flags_are_listed_and_link_to_their_place(built):
    fixture, _, page = built
    flags = page.text("flagged")
    ids = {p.resolve(): set(each.text_by_id) for p, each in page.pages.items()}
    for source, linked, ident in page.targets:
        if ident:   # every link to a place has its target, on the page it names
            assert ident in ids[linked], (source.name, linked.name, ident)
    link_rows = [a for a in page.find("tr") if a.get("id", "").startswith("link-")]

    def row_of(link):
        subject, ses_from, c_from, ses_to, c_to = link
        found = [a for a in link_rows if a["id"].startswith(f"link-{subject}-")
                 and a["id"].endswith(f"-{ses_from}-{c_from}-{ses_to}-{c_to}")]
        assert len(found) == 1
        return found[0]
    subject, ses_from, c_from, ses_to, c_to = fixture.low_confidence_link
    assert f"session {ses_from} component {c_from} → session {ses_to} component {c_to}" in flags
    low = row_of(fixture.low_confidence_link)
    assert low.get("class") == "flagged" and "#" + low["id"] in page.links_in["flagged"]
    assert row_of(fixture.confident_link).get("class") != "flagged"
    subject, merged, survivor = fixture.merged
    assert f"lesion {merged} merged into lesion {survivor}" in flags
    assert f"#lesion-{subject}-{merged}" in page.links_in["flagged"]
    subject, lesion = fixture.border_lesion
    assert f"lesion {lesion} touches the scan border" in flags
    assert "touches the scan border" in page.text(f"lesion-{subject}-{lesion}")
    assert f"#lesion-{subject}-{lesion}" in page.links_in["flagged"]
    subject, lesion = fixture.non_measurable_lesion
    assert f"lesion {lesion} is not measurable (RANO-BM)" in flags
    subject, lesion, phase = fixture.fit_without_interval
    assert f"lesion {lesion}, phase {phase}: power beta 0.88 without interval" in flags
    subject, session = fixture.failed_session
    assert f"session {session} (volumes): mask values are not integers" in flags
    assert "#failures" in page.links_in["flagged"]


def test_known_lesion_beta_is_shown_with_its_interval(built):
    fixture, _, page = built
    subject, lesion, phase, beta, low, high = fixture.known_beta
    text = page.text(f"lesion-{subject}-{lesion}")
    assert f"{phase} power 3 0 60 {beta:.2f} ({low:.2f}–{high:.2f})" in text
    subject, lesion, _ = fixture.fit_without_interval
    assert "0.88 (no interval)" in page.text(f"lesion-{subject}-{lesion}")
    summary = page.text("summary")
    assert "armA untreated power 2 6 0.69 (0.48–0.90)" in summary
    assert "fragile" in summary and "steadier" in summary


def test_cohort_summary_counts(built):
    fixture, _, page = built
    summary = page.text("summary")
    lesions = read_table(fixture.out / "lesions.tsv")
    longitudinal = read_table(fixture.out / "longitudinal.tsv")
    assert "Subjects 3" in summary
    assert f"Lesion components (all sessions) {len(lesions)}" in summary
    tracks = len(longitudinal[["subject", "lesion"]].drop_duplicates())
    assert f"Lesion tracks {tracks}" in summary and "Failed inputs 1" in summary
    assert "Sessions read 8" in summary


@pytest.mark.parametrize("source", ["lesion_components", "matches"])
def test_components_are_mapped_to_the_lesions_stage_2_assigned(built, source):
    # Reference: the fixture's own assignment (component -> lesion as drawn in the tracks).
    # The report takes it from lesion_components.tsv; an OUT written before that table existed
    # has it on the links of matches.tsv (lesion_from / lesion_to), for linked components.
    fixture, _, _ = built
    inputs = load_inputs(fixture.out)
    found = {}
    for subject in ("P01", "P02"):
        assignment = subject_rows(inputs.table("lesion_components.tsv"), subject) \
            if source == "lesion_components" else pd.DataFrame()
        matches = subject_rows(inputs.table("matches.tsv"), subject)
        mapping = component_lesions(assignment, matches)
        found.update({(subject, s, c): lesion for (s, c), lesion in mapping.items()})
    if source == "lesion_components":
        assert found == fixture.component_lesion
    else:
        linked = {k: v for k, v in fixture.component_lesion.items() if k[:1] != ("P03",)}
        assert found.items() <= linked.items() and len(found) >= len(linked) - 2


def _built_flags(built) -> str:
    return built[2].text("flagged")


def test_qa_controls_cover_every_link_and_component(built):
    fixture, _, page = built
    matches = read_table(fixture.out / "matches.tsv")
    wrong = page.find("input", class_="qa-wrong")
    assert sorted((a["data-subject"], a["data-session"], int(a["data-component"]))
                  for a in wrong) == sorted(zip(matches.subject, matches.session_to,
                                                matches.component_to))
    lesions = read_table(fixture.out / "lesions.tsv")
    moves = {(a["data-subject"], a["data-session"], int(a["data-component"]))
             for a in page.find("select", class_="qa-move")}
    assert moves == set(zip(lesions.subject, lesions.session, lesions.component))
    preview = page.text("corrections-preview")
    assert preview == "subject session component lesion note"


def test_slices_use_the_mri_image_when_it_is_found(built):
    _, _, page = built
    text = page.text("lesion-P01-1")
    assert "over the MRI image: session(s) 01, 02, 03" in text
    assert "over the track image alone (image not found): session(s) 04" in text
    assert "over the track image alone (no image given): session(s) 01, 02, 03" in \
        page.text("lesion-P02-1")


def test_relative_input_path_is_found_from_out_parent(built, tmp_path):
    fixture, _, _ = built
    out = _copy(fixture, tmp_path)
    shutil.copytree(fixture.inputs, tmp_path / "inputs")
    provenance = (out / "provenance.json").read_text(encoding="utf-8")
    provenance = provenance.replace(str(fixture.inputs / "manifest.tsv"), "inputs/manifest.tsv")
    (out / "provenance.json").write_text(provenance, encoding="utf-8")
    page = Site(write_report(out))
    assert "over the MRI image: session(s) 01, 02, 03" in page.text("lesion-P01-1")


def test_missing_files_are_named_and_the_rest_is_shown(built, tmp_path):
    fixture, _, _ = built
    out = _copy(fixture, tmp_path)
    for name in ("fits.tsv", "group_fits.tsv", "evaluation.tsv", "provenance.json"):
        (out / name).unlink()
    shutil.rmtree(out / "tracks")
    page = Site(write_report(out))
    missing = page.text("inputs")
    assert "fits.tsv is missing" in missing and "group_fits.tsv is missing" in missing
    assert "tracks/ is missing: lesion slices cannot be drawn." in missing
    assert "provenance.json is missing" in missing
    assert "No evaluation.tsv in OUT" in page.text("evaluation")
    assert "No group fits to show." in page.text("summary")
    assert "lesion 3 is not measurable" in page.text("flagged")  # lesion from matches.tsv
    assert page.find("img") == []   # no track images: no slices
    assert "Lesion volumes of P01 over time" in page.text("tl-title")  # timelines still drawn


def test_components_without_a_known_lesion_are_listed(built, tmp_path):
    fixture, _, _ = built
    out = _copy(fixture, tmp_path)
    shutil.rmtree(out / "tracks")
    (out / "lesion_components.tsv").unlink()
    matches = read_table(out / "matches.tsv")
    write_table(matches.drop(columns=["lesion_from", "lesion_to"]), out / "matches.tsv")
    page = Site(write_report(out))
    assert "session 02 component 3 is not measurable" in page.text("flagged")
    assert "#subject-P01" in page.links_in["flagged"]
    assert "The lesion of each component is unknown" in page.text("subject-P01")
    moves = {(a["data-subject"], a["data-session"], int(a["data-component"]))
             for a in page.find("select", class_="qa-move")}
    lesions = read_table(out / "lesions.tsv")  # every component can still be corrected
    assert moves == set(zip(lesions.subject, lesions.session, lesions.component))


def test_empty_out_folder_gives_a_page_that_says_so(tmp_path):
    page = Site(write_report(tmp_path))
    missing = page.text("inputs")
    for name in ("lesions.tsv", "masks.tsv", "matches.tsv", "longitudinal.tsv", "fits.tsv",
                 "group_fits.tsv", "errors.tsv"):
        assert f"{name} is missing" in missing
    assert "Subjects 0" in page.text("summary")
    assert page.find("img") == []
    assert "Nothing was flagged." in page.text("flagged")


def test_header_only_tables_do_not_break_the_page(built, tmp_path):
    fixture, _, _ = built
    out = _copy(fixture, tmp_path)
    for name in ("lesions.tsv", "masks.tsv", "matches.tsv", "longitudinal.tsv", "fits.tsv",
                 "group_fits.tsv", "errors.tsv", "events.tsv", "evaluation.tsv"):
        columns = read_table(out / name).columns
        write_table(pd.DataFrame(columns=columns), out / name)
    page = Site(write_report(out))
    assert "Every input the report reads was found." in page.text("inputs")
    assert "Subjects 0" in page.text("summary")
    assert "No input failed." in page.text("failures")
    assert "evaluation.tsv has no rows." in page.text("evaluation")


def test_panel_cap_limits_slice_figures(built, tmp_path):
    fixture, _, _ = built
    out = _copy(fixture, tmp_path)
    page = Site(write_report(out, settings=ReportSettings(max_lesion_panels=2)))
    drawn = {(a["alt"].split(",")[0]) for a in page.find("img")}
    flagged = {a["id"] for a in page.find("article", class_="lesion flagged")}
    articles = [a["id"] for a in page.find("article") if "lesion" in a.get("class", "")]
    assert len(drawn) == 2 and len(flagged) >= 2
    with_slices = [i for i in articles if "Slices not drawn" not in page.text(i)]
    assert len(with_slices) == 2 and set(with_slices) <= flagged   # flagged lesions first
    assert sum("Slices not drawn" in page.text(i) for i in articles) == len(articles) - 2


def test_table_text_is_escaped(built, tmp_path):
    fixture, _, _ = built
    out = _copy(fixture, tmp_path)
    errors = read_table(out / "errors.tsv")
    errors.loc[len(errors)] = ["<b>x</b>", "01", "a&b.nii", "volumes", "reason <i>y</i>"]
    write_table(errors, out / "errors.tsv")
    text = write_report(out).read_text(encoding="utf-8")
    assert "<b>x</b>" not in text and "<i>y</i>" not in text
    assert "&lt;b&gt;x&lt;/b&gt;" in text


def test_run_details_come_from_provenance_without_paths(built):
    fixture, text, page = built
    footer = " ".join(page.text_by_id.get("about", []))
    assert "tool version 0.1.0" in re.sub(r"\s+", " ", footer)
    assert "input kind manifest" in re.sub(r"\s+", " ", footer)
    assert str(fixture.inputs) not in text  # input folders may carry identifiers


def test_report_stays_small(built):
    _, _, site = built
    for path in site.pages:   # common practice: pages that open quickly
        assert path.stat().st_size < 1_000_000, path.name


@pytest.mark.parametrize("beta", [0.5, 2.0 / 3.0, 1.0, 1.3])
def test_power_curve_solves_the_growth_law(beta):
    # Reference: numerical integration of dV/dt = alpha * V**beta with scipy.integrate.solve_ivp;
    # k = alpha * V0**(beta - 1) as in docs/methods.md §1.1 (power-law parameterisation).
    v0, k, t0 = 120.0, 0.01, 10.0
    alpha = k * v0 ** (1.0 - beta)
    days = np.linspace(t0, t0 + 60.0, 7)
    solution = solve_ivp(lambda t, v: alpha * v ** beta, (t0, days[-1]), [v0], t_eval=days,
                         rtol=1e-11, atol=1e-12)
    curve = power_curve(days, v0_mm3=v0, k_per_day=k, beta=beta, day_start=t0)
    np.testing.assert_allclose(curve, solution.y[0], rtol=1e-7)


def test_power_curve_worked_example_and_blow_up():
    # Reference: docs/methods.md, check value C1: a = 2, b = 0.5, V0 = 1 gives V = (1 + t)**2.
    np.testing.assert_allclose(power_curve(np.array([1.0, 2.0]), v0_mm3=1.0, k_per_day=2.0,
                                           beta=0.5, day_start=0.0), [4.0, 9.0])
    # Reference: docs/methods.md §1.1, finite-time blow-up at t* = V0**(1-b) / (a (b - 1)) for b >
    # 1.
    t_star = 1.0 / (1.0 * (2.0 - 1.0))
    after = power_curve(np.array([t_star + 0.5]), v0_mm3=1.0, k_per_day=1.0, beta=2.0,
                        day_start=0.0)
    assert math.isnan(after[0])


def test_settings_are_validated():
    with pytest.raises(ValueError, match="max_lesion_panels must be >= 0"):
        ReportSettings(max_lesion_panels=-1)


def test_tables_without_key_columns_or_with_bad_ids_are_reported(built, tmp_path):
    fixture, _, _ = built
    out = _copy(fixture, tmp_path)
    fits = read_table(out / "fits.tsv")
    write_table(fits.drop(columns=["lesion"]), out / "fits.tsv")
    matches = read_table(out / "matches.tsv").astype({"component_to": object})
    matches.loc[0, "component_to"] = "n/a"
    write_table(matches, out / "matches.tsv")
    (out / "events.tsv").write_bytes(b"\xff\xfe\x00broken")
    page = Site(write_report(out))
    missing = page.text("inputs")
    assert "fits.tsv lacks the column(s) lesion" in missing
    assert "events.tsv could not be read" in missing
    rows = [a for a in page.find("tr") if a.get("id", "").startswith("link-")]
    assert len(rows) == len(matches) - 1  # the row without a component is left out


def test_power_rows_with_a_rate_are_drawn(built):
    # The fitted curves in the timelines come from these rows: every power row of the fixture
    # with V0, k_per_day (or alpha) and beta; the exponential row is not a power law.
    fixture, _, _ = built
    from pipeline.report.figures import drawable_power_fits
    fits = read_table(fixture.out / "fits.tsv")
    drawn = drawable_power_fits(fits)
    assert sorted(zip(drawn.subject, drawn.lesion)) == [("P01", 1), ("P01", 2), ("P02", 1),
                                                         ("P02", 2)]
    without_k = fits.assign(k_per_day=float("nan"))  # alpha alone suffices
    assert len(drawable_power_fits(without_k)) == 4
