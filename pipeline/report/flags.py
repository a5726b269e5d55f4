"""Flagged items of the report: what a reviewer should look at, each with its place.

Kinds, in the order the report lists them: failed inputs, low-confidence links, merges, fits
without an interval or with notes, lesions touching the scan border, lesions not measurable by
RANO-BM (Lin et al. 2015, Lancet Oncol 16:e270).
"""
from __future__ import annotations

import math

import pandas as pd

from pipeline.report.data import ReportInputs, as_number, is_true, records
from pipeline.report.html import Flag, number, slug
from pipeline.settings import ReportSettings

#: Order of the kinds of flagged items on the page.
FLAG_KINDS = ("Failed inputs", "Low-confidence links", "Merges", "Fits without interval or "
              "with notes", "Touching the scan border", "Not measurable (RANO-BM)")


def failure_flags(inputs: ReportInputs) -> list[Flag]:
    """One flag per row of errors.tsv (they point at the failures table of the index)."""
    flags = []
    for row in records(inputs.table("errors.tsv")):
        where = f"session {row.get('session')}" if row.get("session") else "input"
        flags.append(Flag(FLAG_KINDS[0], str(row.get("subject", "")) or "(no subject)",
                          f"{where} ({row.get('stage', '')}): {row.get('reason', '')}",
                          "failures"))
    return flags


def subject_flags(links: pd.DataFrame, longitudinal: pd.DataFrame, fits: pd.DataFrame,
                  lesions: pd.DataFrame, mapping: dict, subject: str) -> list[Flag]:
    """Every flag of one subject, in the order of :data:`FLAG_KINDS`."""
    flags = (_link_flags(links, subject) + _merge_flags(longitudinal, links, subject)
             + _fit_flags(fits, subject) + _component_flags(lesions, mapping, subject))
    return sorted(flags, key=lambda f: FLAG_KINDS.index(f.kind))


def lesion_anchor(subject: str, lesion: object) -> str:
    """Id of a lesion's section on its subject's page."""
    return slug("lesion", subject, lesion)


def subject_links(matches: pd.DataFrame, mapping: dict, subject: str,
           settings: ReportSettings) -> pd.DataFrame:
    """matches.tsv rows of one subject with lesion ids, a flag, why, and a page anchor.

    A link is flagged when stage 2 flagged it for review (matches.tsv ``review``, the reason in
    ``review_reason``: ambiguous, small overlap, large jump, separated, ...).
    """
    if matches.empty:
        return pd.DataFrame()
    rows = []
    for row in records(matches):
        key_from = (str(row["session_from"]), int(row["component_from"]))
        key_to = (str(row["session_to"]), int(row["component_to"]))
        reasons = [str(row.get("review_reason") or "") or "flagged by stage 2"] \
            if is_true(row.get("review", False)) else []
        rows.append({**row, "lesion_from": mapping.get(key_from, "?"),
                     "lesion_to": mapping.get(key_to, "?"), "flagged": bool(reasons),
                     "why": "; ".join(reasons + (["corrected by QA"] if is_true(
                         row.get("corrected", False)) else [])),
                     "anchor": slug("link", subject, *key_from, *key_to)})
    return pd.DataFrame(rows)


def _link_flags(links: pd.DataFrame, subject: str) -> list[Flag]:
    if links.empty:
        return []
    return [Flag(FLAG_KINDS[1], subject,
                 f"session {r['session_from']} component {r['component_from']} → session "
                 f"{r['session_to']} component {r['component_to']} (lesion {r['lesion_to']}): "
                 f"{r['why']}", r["anchor"]) for r in records(links[links["flagged"]])]


def _merge_flags(longitudinal: pd.DataFrame, links: pd.DataFrame, subject: str) -> list[Flag]:
    if "status" in longitudinal:
        merged = longitudinal[longitudinal["status"].astype(str) == "merged"]
        merged = merged.sort_values("day").drop_duplicates("lesion")
        return [Flag(FLAG_KINDS[2], subject, f"lesion {number(r['lesion'])} merged into lesion "
                     f"{r.get('merged_into') or '?'} at session {r['session']}",
                     lesion_anchor(subject, number(r["lesion"])))
                for r in records(merged)]
    if links.empty or "relation" not in links:
        return []
    merges = links[links["relation"].astype(str) == "merges"]
    return [Flag(FLAG_KINDS[2], subject, f"session {r['session_from']} component "
                 f"{r['component_from']} merges into session {r['session_to']} component "
                 f"{r['component_to']}", r["anchor"]) for r in records(merges)]


def _fit_flags(fits: pd.DataFrame, subject: str) -> list[Flag]:
    """Power-law fits with a beta but no interval, and notes of each lesion and phase's best
    row (every row when fits.tsv has no ``best`` column)."""
    if fits.empty:
        return []
    flags = []
    frame = fits if "phase" in fits else fits.assign(phase="")
    for (lesion, phase), rows in frame.groupby(["lesion", "phase"], sort=False):
        texts = []
        for row in records(rows):
            beta = as_number(row.get("beta"))
            lo, hi = as_number(row.get("beta_ci_low")), as_number(row.get("beta_ci_high"))
            if str(row.get("model", "power")) == "power" and math.isfinite(beta) \
                    and not (math.isfinite(lo) and math.isfinite(hi)):
                texts.append(f"power beta {beta:.2f} without interval")
        noted = rows[[is_true(b) for b in rows["best"]]] if "best" in rows else rows
        notes = dict.fromkeys(str(n) for n in noted.get("note", pd.Series(dtype=str)) if str(n))
        texts += [f"note: {n}" for n in notes]
        if texts:
            flags.append(Flag(FLAG_KINDS[3], subject, f"lesion {number(lesion)}, phase "
                              f"{phase}: " + "; ".join(texts),
                              lesion_anchor(subject, number(lesion))))
    return flags


def _component_flags(lesions: pd.DataFrame, mapping: dict, subject: str) -> list[Flag]:
    flags = []
    for column, wanted, kind, what in (("touches_border", True, FLAG_KINDS[4],
                                        "touches the scan border"),
                                       ("measurable", False, FLAG_KINDS[5],
                                        "is not measurable (RANO-BM)")):
        if column not in lesions:
            continue
        hit = lesions[[is_true(v) == wanted and v is not None for v in lesions[column]]]
        by_lesion: dict[object, list[str]] = {}
        for row in records(hit):
            key = (str(row["session"]), int(row["component"]))
            if key in mapping:
                by_lesion.setdefault(mapping[key], []).append(key[0])
            else:
                flags.append(Flag(kind, subject, f"session {key[0]} component {key[1]} {what}",
                                  slug("subject", subject)))
        flags += [Flag(kind, subject, f"lesion {lesion} {what} at session(s) "
                       f"{', '.join(dict.fromkeys(sessions))}", lesion_anchor(subject, lesion))
                  for lesion, sessions in by_lesion.items()]
    return flags
