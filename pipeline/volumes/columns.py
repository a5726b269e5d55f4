"""The column dictionary of lesions.tsv (BIDS JSON sidecar form: one entry per column with
its description and units), in the table's order; the tuple of names is derived from it."""
from __future__ import annotations

#: The columns that name a scan, shared by the tables of scans.
SCAN_ID = {
    "subject": {"Description": "Subject label (BIDS label without 'sub-', or as in the manifest)"},
    "session": {"Description": "Session label (without 'ses-', or as in the manifest)"},
    "day": {"Description": "Time since the subject's first session", "Units": "day"},
}

#: lesions.tsv, one row per connected component in one mask (key columns of docs/outputs.md
#: first).
LESIONS = {
    **SCAN_ID,
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

#: Columns of lesions.tsv in order.
LESION_COLUMNS = tuple(LESIONS)
#: The columns stage 1 measures per component (the rest name the scan).
MEASURE_COLUMNS = LESION_COLUMNS[3:22]
