"""The QA report at cohort scale: build time against stages 1-3, page sizes, Chromium render time.

Run: python benchmarks/report.py [--cohorts 12 99 1000L] [--no-browser]

Three invented cohorts: the 12- and 99-subject demo cohorts (``lesion-growth demo``'s inputs)
and a generated cohort of 1000 lesions (250 subjects, 4 lesions each, 3 sessions, small grids).
For each: stages 1-3 (``run`` without its report, one worker) are timed, then the report is built
in the same process and timed, so the ratio report / stages compares two figures of one run; a
second build shows what the panel cache saves. Then the sizes of ``report.html`` and of the
largest subject page, and the time headless Chromium needs to load and first paint them
(Navigation Timing and Paint Timing from the page itself). Figures, not a test: nothing asserts.
Takes a few minutes on a quiet two-core machine (making the 99 demo subjects takes most).
"""
from __future__ import annotations

import argparse
import shutil
import sys
import tempfile
import time
from pathlib import Path

import nibabel as nib
import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from pipeline.config import load_config  # noqa: E402
from pipeline.demo.cohort import make_demo_inputs  # noqa: E402
from pipeline.report.build import write_report  # noqa: E402
from pipeline.run.commands import evaluate_only, run_all  # noqa: E402

CHROMIUM = next((p for p in (shutil.which("chromium"), shutil.which("chromium-browser"),
                             "/usr/bin/chromium") if p and Path(p).is_file()), None)
DRIVER = next((p for p in ("/usr/bin/chromedriver", shutil.which("chromedriver"))
               if p and Path(p).is_file()), None)


def generated_cohort(folder: Path, *, subjects: int = 250, lesions: int = 4,
                     sessions: int = 3) -> Path:
    """Invented masks: per subject ``lesions`` spheres that grow over ``sessions`` sessions."""
    shape, rng = (80, 80, 48), np.random.default_rng(11)
    grid = np.indices(shape, dtype=np.float32)
    lines = ["subject\tsession\tmask\tday\tgroup"]
    (folder / "masks").mkdir(parents=True, exist_ok=True)
    affine = np.diag([1.0, 1.0, 2.0, 1.0])
    for s in range(subjects):
        centres = [(16 + 16 * (i % 3), 20 + 36 * (i // 3), 12 + 24 * (i % 2))
                   for i in range(lesions)]
        rates = rng.uniform(0.05, 0.5, lesions)
        for t in range(sessions):
            mask = np.zeros(shape, np.uint8)
            for centre, rate in zip(centres, rates):
                radius = 3.0 * (1.0 + rate * t)
                inside = sum((g - c) ** 2 * w for g, c, w in zip(grid, centre, (1, 1, 4)))
                mask[inside <= radius ** 2] = 1
            name = f"masks/sub-G{s:03d}_ses-{t + 1:02d}_mask.nii.gz"
            nib.save(nib.Nifti1Image(mask, affine), str(folder / name))
            lines.append(f"G{s:03d}\t{t + 1:02d}\t{name}\t{60 * t}\t{'arm-' + 'AB'[s % 2]}")
    manifest = folder / "manifest.tsv"
    manifest.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return manifest


def render_times(paths: list[Path]) -> list[tuple[str, float, float]]:
    """(name, first frame ms, load event ms) of each page in headless Chromium.

    First frame: the first contentful paint (Paint Timing) when Chromium records one, else the
    time of the second animation frame after the navigation started (the first screen is then
    on the screen)."""
    try:
        from selenium import webdriver
        from selenium.webdriver.chrome.service import Service
    except ImportError:
        return []
    if CHROMIUM is None or DRIVER is None:
        return []
    options = webdriver.ChromeOptions()
    options.binary_location = CHROMIUM
    for flag in ("--headless", "--no-sandbox", "--disable-gpu", "--window-size=1200,900",
                 "--disable-background-networking", "--no-first-run",
                 f"--user-data-dir={tempfile.mkdtemp()}"):
        options.add_argument(flag)
    driver = webdriver.Chrome(service=Service(executable_path=DRIVER), options=options)
    driver.set_page_load_timeout(120)
    results = []
    try:
        for path in paths:
            driver.get("about:blank")
            driver.get(path.resolve().as_uri())
            paint = driver.execute_async_script(
                "var done = arguments[arguments.length - 1];"
                "var p = performance.getEntriesByName('first-contentful-paint')[0];"
                "if (p) { done(p.startTime); return; }"
                "requestAnimationFrame(function () { requestAnimationFrame(function () {"
                "done(performance.now()); }); });")
            load = driver.execute_script(
                "var n = performance.getEntriesByType('navigation')[0];"
                "return n.loadEventEnd - n.startTime;")
            results.append((path.name, float(paint), float(load)))
    finally:
        driver.quit()
    return results


def one(name: str, out: Path, *, browser: bool) -> None:
    config = load_config(None)
    if name.endswith("L"):
        manifest, events, outcomes = generated_cohort(out / "inputs"), None, None
    else:
        demo = make_demo_inputs(out / "inputs", n_subjects=int(name))
        manifest, events, outcomes = demo.manifest, demo.events, demo.outcomes
    t0 = time.perf_counter()
    run_all(manifest, out, config=config, events=events, workers=1, quiet=True, report=False)
    stages = time.perf_counter() - t0
    if outcomes is not None:
        evaluate_only(out, outcomes, figures=("beta",), phase="untreated", model="power",
                      positive="progression")
    t0 = time.perf_counter()
    write_report(out, settings=config.report)
    build = time.perf_counter() - t0
    t0 = time.perf_counter()
    write_report(out, settings=config.report)
    again = time.perf_counter() - t0
    pages = sorted((out / "report").glob("subject-*.html"), key=lambda p: p.stat().st_size)
    lesions = sum(1 for line in (out / "longitudinal.tsv").read_text().splitlines()[1:]
                  if line) if (out / "longitudinal.tsv").is_file() else 0
    folder = sum(p.stat().st_size for p in (out / "report").iterdir())
    print(f"\ncohort {name}: {len(pages)} subject pages, {lesions} lesion-session rows")
    print(f"  stages 1-3 {stages:7.1f} s   report {build:6.1f} s   ratio report/stages "
          f"{build / stages:5.2f}   rebuild with cached panels {again:5.1f} s")
    print(f"  report.html {(out / 'report.html').stat().st_size / 1e6:6.2f} MB   largest "
          f"subject page {pages[-1].stat().st_size / 1e6:6.2f} MB ({pages[-1].name})   "
          f"report/ in all {folder / 1e6:6.1f} MB")
    if browser:
        for page, paint, load in render_times([out / "report.html", pages[-1]]):
            print(f"  Chromium {page:28s} first screen {paint:7.0f} ms   load {load:7.0f} ms")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--cohorts", nargs="+", default=["12", "99", "1000L"],
                        help="demo subject counts, and 1000L for the generated cohort")
    parser.add_argument("--no-browser", action="store_true")
    args = parser.parse_args()
    for name in args.cohorts:
        with tempfile.TemporaryDirectory() as tmp:
            one(name, Path(tmp) / "out", browser=not args.no_browser)


if __name__ == "__main__":
    main()
