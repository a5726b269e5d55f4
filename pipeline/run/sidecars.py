"""BIDS JSON data dictionaries of the tables written by the workflow itself (one entry per
column, with units); each stage module keeps the dictionary of its own table."""
from __future__ import annotations

_ID = {
    "subject": {"Description": "Subject label (BIDS label without 'sub-', or as in the manifest)"},
    "session": {"Description": "Session label (without 'ses-', or as in the manifest)"},
    "day": {"Description": "Time since the subject's first session", "Units": "day"},
}

LESION_SIDECAR = {
    **_ID,
    "component": {"Description": "Connected component number within this scan, 1 = largest"},
    "label": {"Description": "Most frequent selected label value inside the component"},
    "voxels": {"Description": "Number of voxels in the component"},
    "volume_mm3": {"Description": "Voxel count x |det| of the affine's 3x3 part",
                   "Units": "mm^3"},
    "centroid_x_mm": {"Description": "Centroid, RAS+ world x (towards the subject's right)",
                      "Units": "mm"},
    "centroid_y_mm": {"Description": "Centroid, RAS+ world y (anterior)", "Units": "mm"},
    "centroid_z_mm": {"Description": "Centroid, RAS+ world z (superior)", "Units": "mm"},
    "max_axial_diameter_mm": {
        "Description": "Largest distance between voxel centres of the lesion within one axial "
                       "slice (slices along the voxel axis closest to world superior-inferior), "
                       "maximum over slices", "Units": "mm"},
    "equivalent_diameter_mm": {"Description": "Diameter of the sphere of equal volume",
                               "Units": "mm"},
    **{f"bbox_{a}_{m}": {"Description": f"Voxel bounding box, {m}imum index along axis {a} "
                         "(inclusive, 0-based)"} for a in "ijk" for m in ("min", "max")},
    "axial_slices": {"Description": "Number of axial slices the lesion spans"},
    "touches_border": {"Description": "The lesion touches the edge of the image grid",
                       "Levels": {"true": "touches", "false": "does not touch"}},
    "measurable": {"Description": "RANO-BM measurable: longest diameter >= 10 mm and visible on "
                                  ">= 2 axial slices (Lin NU et al. Lancet Oncol 2015), the "
                                  "diameter taken edge to edge (max_axial_diameter_edge_mm), "
                                  "as a reader measures it on screen",
                   "Levels": {"true": "measurable", "false": "not measurable"}},
    "max_axial_diameter_edge_mm": {
        "Description": "max_axial_diameter_mm measured edge to edge: the centre-to-centre "
                       "distance plus one voxel's in-slice extent along the measured line "
                       "(common practice); a lesion 10 voxels wide at 1 mm reads 10 mm here and "
                       "9 mm centre to centre", "Units": "mm"},
    "mask": {"Description": "Mask path as given in the input"},
    "group": {"Description": "Group from the manifest ('' = none; fitted as 'all')"},
}

MASK_SIDECAR = {
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

ERROR_SIDECAR = {
    "subject": _ID["subject"], "session": _ID["session"],
    "path": {"Description": "Input file path as given"},
    "stage": {"Description": "Where the input failed",
              "Levels": {"input": "input table row", "volumes": "reading or measuring the mask",
                         "match": "matching", "fit": "fitting"}},
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
