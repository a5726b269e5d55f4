"""BIDS JSON data dictionaries for the stage-1 tables (one entry per column, with units)."""
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
                                  ">= 2 axial slices (Lin NU et al. Lancet Oncol 2015)",
                   "Levels": {"true": "measurable", "false": "not measurable"}},
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
}

ERROR_SIDECAR = {
    "subject": _ID["subject"], "session": _ID["session"],
    "path": {"Description": "Input file path as given"},
    "stage": {"Description": "Where the input failed",
              "Levels": {"input": "input table row", "volumes": "reading or measuring the mask",
                         "match": "matching", "fit": "fitting"}},
    "reason": {"Description": "One-line reason a person can act on"},
}
