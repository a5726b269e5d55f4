"""Column dictionaries (BIDS JSON sidecar form: one entry per column, with units) of the tables
the run layer itself writes: masks.tsv, errors.tsv, events.tsv. Each stage keeps the dictionary
of its own tables; :mod:`pipeline.run.catalog` lists them all."""
from __future__ import annotations

from pipeline.volumes.columns import SCAN_ID as _ID


MASK_COLUMNS = {
    **_ID,
    "mask": {"Description": "Mask path as given in the input"},
    "image": {"Description": "Image path as given in the input (may be empty)"},
    "group": {"Description": "Group from the manifest"},
    "components": {"Description": "Number of lesion components in the mask (0 = no lesion)"},
    "volume_mm3": {"Description": "Total lesion volume in the mask", "Units": "mm^3"},
    "voxel_volume_mm3": {"Description": "Volume of one voxel", "Units": "mm^3"},
    "shape_x": {"Description": "Grid size along voxel axis i"},
    "shape_y": {"Description": "Grid size along voxel axis j"},
    "shape_z": {"Description": "Grid size along voxel axis k"},
    "sha256": {"Description": "SHA-256 of the mask file's bytes"},
    "track_image": {"Description": "Track image that stage 2 writes for this mask, relative to "
                    "the output folder (named from the labels' ASCII letters and digits)"},
}

ERROR_COLUMNS = {
    "subject": _ID["subject"], "session": _ID["session"],
    "path": {"Description": "Input file path as given"},
    "stage": {"Description": "Where the input failed",
              "Levels": {"input": "input table row", "volumes": "reading or measuring the mask",
                         "image": "the MRI image under the mask", "match": "matching",
                         "events": "the events table", "evaluate": "marker evaluation"}},
    "reason": {"Description": "One-line reason a person can act on"},
}

EVENT_COLUMNS = {
    "subject": {"Description": "Subject label"},
    "day": {"Description": "Day of the event since the subject's first session (dates are not "
            "written). For phases, an event given as a date without a time counts from the end "
            "of that day, so sessions imaged that day fall in the phase before it",
            "Units": "day"},
    "event": {"Description": "Event as given in the events table (e.g. radiosurgery)"},
    "lesion": {"Description": "Lesion id the event concerns; n/a = every lesion of the subject"},
}


#: registration.tsv, one row per registered session (with ``matching.register``).
REGISTRATION_COLUMNS = {
    "subject": {"Description": "Subject label"},
    "session": {"Description": "Session registered onto the subject's first session"},
    "reference_session": {"Description": "The subject's first session (fixed image)"},
    "quality": {"Description": "Pearson correlation of the reference image with the registered "
                "image over the reference foreground (1 = identical up to scale)", "Units": "1"},
    "quality_before": {"Description": "The same correlation without registration", "Units": "1"},
    "metric_value": {"Description": "Final Mattes mutual information (lower is better)"},
    "matrix_ras": {"Description": "4x4 world -> world (RAS+ mm) matrix, 16 numbers row by row, "
                   "mapping this session's coordinates into the reference session's"},
}
