"""Reading label masks and writing label images: the only place that touches image files.

Masks are read in their stored integer type (never as float64), the header is honoured as the
NIfTI-1 standard defines it (sform before qform, ``xyzt_units``, ``scl_slope``/``scl_inter``),
and an image whose declared size exceeds the memory cap is refused before its data is decompressed.
All geometry leaves this module as a float64 voxel -> RAS+ millimetre affine.
"""
from __future__ import annotations

import hashlib
import io
import zlib
from pathlib import Path

import nibabel as nib
import numpy as np

from pipeline.errors import InputError
from pipeline.settings import VolumeSettings
from pipeline.io.atomic import atomic_path
from pipeline.io.image import check_memory, MaskImage
from pipeline.voxels import integer_labels, label_dtype
from pipeline.geometry import corner_gap_mm, UNIT_TO_MM

NIFTI_SUFFIXES = (".nii", ".nii.gz")
ITK_SUFFIXES = (".nrrd", ".nhdr", ".mha", ".mhd")


def suffix_of(path: str | Path) -> str:
    """The file type suffix, with ``.nii.gz`` kept whole.

    >>> suffix_of("sub-01_mask.nii.gz"), suffix_of("a.MHA")
    ('.nii.gz', '.mha')
    """
    name = str(path).lower()
    for suffix in NIFTI_SUFFIXES[::-1] + ITK_SUFFIXES:
        if name.endswith(suffix):
            return suffix
    return Path(name).suffix


def load_mask(path: str | Path, *, settings: VolumeSettings = VolumeSettings(),
              raw: bytes | None = None) -> MaskImage:
    """Read one label mask; every problem becomes an ``InputError`` naming the file and the reason.

    Parameters
    ----------
    path : str or Path
        ``.nii``/``.nii.gz`` (NIfTI-1 or NIfTI-2) or ``.nrrd``/``.mha``/``.mhd`` (via SimpleITK).
    settings : VolumeSettings
        ``max_memory_mb``, ``accept_unknown_orientation`` and ``affine_tolerance_mm`` are used.
    raw : bytes, optional
        The file's bytes when the caller has read them already (NIfTI only).
    """
    path = Path(path)
    if raw is None and not path.exists():
        raise InputError(f"{path}: file not found", path=str(path))
    if raw is None and path.is_dir():
        raise InputError(f"{path}: is a folder, expected a mask file", path=str(path))
    suffix = suffix_of(path)
    if suffix in NIFTI_SUFFIXES:
        raw = path.read_bytes() if raw is None else raw
        if not raw:
            raise InputError(f"{path}: file is empty", path=str(path))
        mask = _load_nifti_bytes(raw, gz=suffix == ".nii.gz", name=str(path), settings=settings)
    elif suffix in ITK_SUFFIXES:
        from pipeline.io.itk import load_itk_mask

        mask = load_itk_mask(path, settings=settings)
    else:
        raise InputError(f"{path}: unsupported file type {suffix!r}; expected .nii, .nii.gz, "
                         ".nrrd, .mha or .mhd", path=str(path))
    return mask


def _inflate():
    """The gzip decoder: python-isal's (ISA-L) when installed - it decoded the benchmark's masks
    3-10x faster than the standard library's zlib here (benchmarks/volumes.py) - else zlib.
    Both take the same calls and give the same bytes."""
    try:
        from isal import isal_zlib
    except ImportError:  # pragma: no cover - isal is a dependency; zlib is the fallback
        return zlib
    return isal_zlib


def _gzip_errors(module) -> tuple[type[Exception], ...]:
    return (zlib.error,) if module is zlib else (zlib.error, module.error)


def _gzip_error(exc: Exception, name: str) -> InputError:
    text = str(exc)
    reason = "truncated" if "incomplete" in text or "truncated" in text else "corrupt"
    return InputError(f"{name}: gzip data is {reason} ({text})", path=name)


def _decompress_head(raw: bytes, name: str, size: int = 544) -> bytes:
    """The first ``size`` decompressed bytes (the header), without decompressing the rest."""
    try:
        return zlib.decompressobj(wbits=31).decompress(raw, size)
    except zlib.error as exc:
        raise _gzip_error(exc, name) from None


def _decompress_into(raw: bytes, needed: int, name: str, module=None) -> np.ndarray:
    """Decompress a gzip stream into one array of at most the declared size, in one call (no
    second copy of the data, so peak memory stays near one byte per stored byte; a stream that
    would decompress to more than the header declares keeps only that much). The stream is
    always decoded to its end, 1 MB at a time past the image, so its CRC-32 and length are
    checked. The array is read-only."""
    module = module or _inflate()
    stream = module.decompressobj(wbits=31)
    try:
        body, more = stream.decompress(raw, needed), b""
        while len(body) == needed and not stream.eof:   # decode to the end: the CRC is checked
            more = stream.decompress(stream.unconsumed_tail, 1 << 20)   # (the rest is dropped)
            if not more and not stream.unconsumed_tail:
                break
    except _gzip_errors(module) as exc:
        raise _gzip_error(exc, name) from None
    if len(body) == needed and not stream.eof:
        raise InputError(f"{name}: gzip data is truncated (the stream's end and checksum are "
                         "missing)", path=name)
    if len(body) < needed and not stream.eof:
        raise InputError(f"{name}: gzip data is truncated (stream ends after {len(body)} of "
                         f"{needed} bytes)", path=name)
    return np.frombuffer(body, np.uint8)


def _parse_header(head: bytes, name: str) -> nib.Nifti1Header:
    if len(head) < 348:
        raise InputError(f"{name}: file is too short to hold a NIfTI header "
                         f"({len(head)} bytes)", path=name)
    size_le = int.from_bytes(head[:4], "little")
    size_be = int.from_bytes(head[:4], "big")
    klass = nib.Nifti2Header if 540 in (size_le, size_be) else nib.Nifti1Header
    if 348 not in (size_le, size_be) and klass is nib.Nifti1Header:
        raise InputError(f"{name}: not a NIfTI file (sizeof_hdr is {size_le})", path=name)
    size = 540 if klass is nib.Nifti2Header else 348
    try:  # header only: extensions are never read (they may hold identifiers)
        header = klass.from_fileobj(io.BytesIO(head[:size]), check=False)
        _check_pixdim(header, name)      # before nibabel's check_fix silently repairs it
        header.check_fix()
        return header
    except InputError:
        raise
    except Exception as exc:  # nibabel raises several types for broken headers
        raise InputError(f"{name}: invalid NIfTI header ({exc})", path=name) from None


def _check_pixdim(header: nib.Nifti1Header, name: str) -> None:
    """NIfTI-1: pixdim[1..dim[0]] are voxel widths, positive; refuse zero, negative, NaN."""
    ndim = min(3, max(1, int(header["dim"][0]) if 1 <= int(header["dim"][0]) <= 7 else 3))
    sizes = np.asarray(header["pixdim"][1:ndim + 1], dtype=float)
    if not np.all(np.isfinite(sizes)) or np.any(sizes <= 0):
        raise InputError(f"{name}: impossible voxel sizes {tuple(sizes.tolist())}", path=name)


def _load_nifti_bytes(raw: bytes, *, gz: bool, name: str,
                      settings: VolumeSettings) -> MaskImage:
    sha = hashlib.sha256(raw).hexdigest()
    head = _decompress_head(raw, name) if gz else raw[:544]
    header = _parse_header(head, name)
    shape = _mask_shape(header, name)
    dtype = header.get_data_dtype()
    if dtype.kind not in "iuf" or dtype.fields:
        raise InputError(f"{name}: data type {header.get_value_label('datatype')} cannot hold "
                         "labels; expected an integer type", path=name)
    check_memory(shape, dtype.itemsize, name, settings)
    try:
        affine, warnings = nifti_affine(header, name=name, settings=settings)
        slope, inter = header.get_slope_inter()
        file_affine = np.asarray(header.get_best_affine(), dtype=np.float64)
        forms, codes = stored_forms(header)
    except (ValueError, nib.spatialimages.HeaderDataError) as exc:
        if isinstance(exc, InputError):
            raise
        raise InputError(f"{name}: invalid NIfTI header ({exc})", path=name) from None
    units = int(header["xyzt_units"]) & 0x07
    vox = float(header["vox_offset"])
    count = int(np.prod(shape))
    if not np.isfinite(vox) or vox < 0 or vox > len(raw) * (1032 if gz else 1):
        raise InputError(f"{name}: impossible vox_offset {vox:g} in the header", path=name)
    offset = int(vox)
    needed = offset + count * dtype.itemsize
    body = _decompress_into(raw, needed, name) if gz else np.frombuffer(raw, np.uint8)
    if len(body) < needed:
        raise InputError(f"{name}: file is truncated: header declares {needed} bytes, "
                         f"file holds {len(body)}", path=name)
    data = body[offset:needed].view(dtype).reshape(shape, order="F")
    data = integer_labels(data, slope, inter, name=name)
    return MaskImage(data=data, affine=affine, sha256=sha, warnings=tuple(warnings),
                     file_affine=file_affine, units_code=units, forms=forms, form_codes=codes)


def load_image(path: str | Path, *, settings: VolumeSettings = VolumeSettings(
        accept_unknown_orientation=True)) -> tuple[np.ndarray, np.ndarray]:
    """Read a grey-level NIfTI image (e.g. the MRI under a mask) and its RAS+ mm affine.

    The first volume of a 4-D image is kept. With ``scl_slope``/``scl_inter`` set, the values
    are scaled to float32; otherwise they keep the stored type (no copy). The data stay in
    stored voxel order. Problems are an ``InputError`` naming the file and the reason.

    Examples
    --------
    >>> import tempfile
    >>> path = Path(tempfile.mkdtemp()) / "t1.nii.gz"
    >>> nib.save(nib.Nifti1Image(np.arange(8, dtype=np.int16).reshape(2, 2, 2),
    ...                          np.diag([2.0, 2.0, 2.0, 1.0])), str(path))
    >>> data, affine = load_image(path)
    >>> int(data[1, 1, 1]), data.dtype.name, float(affine[0, 0])
    (7, 'int16', 2.0)
    """
    path = Path(path)
    name = str(path)
    if suffix_of(path) not in NIFTI_SUFFIXES or not path.is_file():
        raise InputError(f"{name}: not a NIfTI file", path=name)
    raw = path.read_bytes()
    gz = suffix_of(path) == ".nii.gz"
    header = _parse_header(_decompress_head(raw, name) if gz else raw[:544], name)
    dims = [max(1, int(d)) for d in header["dim"][1:max(1, min(7, int(header["dim"][0]))) + 1]]
    shape = tuple((dims + [1, 1, 1])[:3])
    dtype = header.get_data_dtype()
    if dtype.kind not in "iuf" or dtype.fields:
        raise InputError(f"{name}: data type {header.get_value_label('datatype')} is not a "
                         "grey-level image", path=name)
    check_memory(shape, dtype.itemsize, name, settings)
    affine, _ = nifti_affine(header, name=name, settings=settings)
    offset = int(header["vox_offset"])
    needed = offset + int(np.prod(shape)) * dtype.itemsize
    if gz:
        module = _inflate()
        try:
            body = module.decompressobj(wbits=31).decompress(raw, needed)
        except _gzip_errors(module) as exc:
            raise _gzip_error(exc, name) from None
    else:
        body = raw[:needed]
    if len(body) < needed:
        raise InputError(f"{name}: file is truncated", path=name)
    data = np.frombuffer(body, np.uint8)[offset:needed].view(dtype).reshape(shape, order="F")
    slope, inter = header.get_slope_inter()
    scaled = slope is not None and np.isfinite(slope) and slope not in (0, 1) or (
        inter is not None and np.isfinite(inter) and inter != 0)
    if scaled:
        data = data * np.float32(slope if slope else 1.0) + np.float32(inter or 0.0)
    return data, affine


def _mask_shape(header: nib.Nifti1Header, name: str) -> tuple[int, int, int]:
    dims = [int(d) for d in header["dim"][1:int(header["dim"][0]) + 1]]
    if not 1 <= len(dims) <= 7 or any(d < 1 for d in dims):
        raise InputError(f"{name}: impossible image dimensions {dims}", path=name)
    while len(dims) > 3 and dims[-1] == 1:
        dims.pop()
    if len(dims) > 3:
        extra = int(np.prod(dims[3:]))
        raise InputError(f"{name}: mask has {extra} volumes (shape {tuple(dims)}); expected one "
                         "3-D mask", path=name)
    while len(dims) < 3:
        dims.append(1)
    return (dims[0], dims[1], dims[2])


def nifti_affine(header: nib.Nifti1Header, *, name: str,
                 settings: VolumeSettings = VolumeSettings()) -> tuple[np.ndarray, list[str]]:
    """Voxel -> RAS+ mm affine by the NIfTI-1 rules: sform if its code is set, else qform.

    Spatial units are converted to mm from ``xyzt_units`` (code 0 is taken as mm with a
    warning). Both codes 0 is refused unless ``accept_unknown_orientation`` is set.
    """
    warnings: list[str] = []
    s_code, q_code = int(header["sform_code"]), int(header["qform_code"])
    zooms = np.asarray(header.get_zooms()[:3], dtype=float)
    if not np.all(np.isfinite(zooms)) or np.any(zooms[: _ndim(header)] <= 0):
        raise InputError(f"{name}: impossible voxel sizes {tuple(zooms.tolist())}", path=name)
    if s_code == 0 and q_code == 0:
        if not settings.accept_unknown_orientation:
            raise InputError(f"{name}: orientation unknown (sform_code and qform_code are 0); set "
                             "volumes.accept_unknown_orientation = true to assume nibabel's "
                             "default", path=name)
        warnings.append(f"{name}: orientation unknown (sform and qform codes 0); assumed "
                        "nibabel's default orientation")
    affine = np.asarray(header.get_best_affine(), dtype=np.float64)
    if s_code and q_code:
        gap = corner_gap_mm(header.get_sform(), header.get_qform(), header["dim"][1:4])
        if gap > settings.affine_tolerance_mm:
            warnings.append(f"{name}: sform and qform disagree by {gap:.3g} mm; using the sform")
    if not np.all(np.isfinite(affine)):
        raise InputError(f"{name}: affine has non-finite values", path=name)
    unit = int(header["xyzt_units"]) & 0x07
    if unit not in UNIT_TO_MM:
        raise InputError(f"{name}: unknown spatial unit code {unit} in xyzt_units", path=name)
    if unit == 0:
        warnings.append(f"{name}: spatial unit unknown (xyzt_units 0); taken as millimetres")
    affine[:3, :] *= UNIT_TO_MM[unit]
    det = float(np.linalg.det(affine[:3, :3]))
    if not np.isfinite(det) or abs(det) < 1e-12:
        raise InputError(f"{name}: affine is singular (determinant {det:.3g})", path=name)
    sizes = np.sqrt((affine[:3, :3] ** 2).sum(axis=0))
    if np.any(sizes > 100.0):
        raise InputError(f"{name}: voxel sizes {tuple(np.round(sizes, 3))} mm exceed 100 mm",
                         path=name)
    return affine, warnings


def _ndim(header: nib.Nifti1Header) -> int:
    return min(3, int(header["dim"][0]))


def stored_forms(header: nib.Nifti1Header) -> tuple[np.ndarray, tuple[int, int]]:
    """The header's sform and qform as stored (NaN where the code is 0) and their codes."""
    forms = np.full((2, 4, 4), np.nan)
    sform, s_code = header.get_sform(coded=True)
    qform, q_code = header.get_qform(coded=True)
    if sform is not None:
        forms[0] = sform
    if qform is not None:
        forms[1] = qform
    return forms, (int(s_code), int(q_code))


def save_label_image(path: str | Path, labels: np.ndarray, affine: np.ndarray, *,
                     units_code: int = 2, forms: np.ndarray | None = None,
                     form_codes: tuple[int, int] = (1, 1), durable: bool = True) -> None:
    """Write a label image from a fresh header: geometry only, slope 1, no text fields.

    ``affine`` is the voxel -> world affine in the unit named by ``units_code`` (NIfTI-1 spatial
    unit code; 2 = mm), so a track image copies its input mask's geometry exactly.
    """
    kept = labels.dtype in (np.dtype(np.uint8), np.dtype(np.int16), np.dtype(np.int32))
    dtype = labels.dtype if kept else label_dtype(int(labels.max(initial=0)))
    header = nib.Nifti1Header()
    header.set_data_dtype(dtype)
    image = nib.Nifti1Image(np.asarray(labels, dtype=dtype), affine, header=header)
    if forms is None:
        image.set_sform(affine, code=1)
        image.set_qform(affine, code=1)
    else:   # copy the input's sform and qform (and their codes) exactly, absent ones absent
        sform, qform = forms
        has_s, has_q = form_codes[0] > 0 and np.isfinite(sform).all(), \
            form_codes[1] > 0 and np.isfinite(qform).all()
        image.set_sform(sform if has_s else affine, code=form_codes[0] if has_s else 0)
        image.set_qform(qform if has_q else None, code=form_codes[1] if has_q else 0)
    image.header["xyzt_units"] = units_code & 0x07
    image.header.set_slope_inter(1.0, 0.0)
    image.header["intent_code"] = 1002  # NIFTI_INTENT_LABEL (nifti1.h)
    with atomic_path(path, durable=durable) as tmp:   # durable: see files.atomic_path
        Path(tmp).write_bytes(nifti_gz_bytes(image))


#: gzip level of written label images: ISA-L's level 1 compressed the benchmark's track images
#: about 50x faster than the standard library's level 1 (nibabel's default) and smaller
LABEL_GZIP_LEVEL = 1


def nifti_gz_bytes(image: nib.Nifti1Image) -> bytes:
    """``image`` as a gzip-compressed single NIfTI-1 file: the bytes ``image.to_bytes()`` gives,
    compressed with ISA-L (python-isal) when installed, else zlib, at ``LABEL_GZIP_LEVEL``.

    nibabel's header writer is used as is; the voxels go out as one block in the file's
    (Fortran) order, without a transposing copy when the array is already in that order.

    Examples
    --------
    >>> import gzip
    >>> image = nib.Nifti1Image(np.arange(24, dtype=np.int16).reshape(2, 3, 4), np.eye(4))
    >>> gzip.decompress(nifti_gz_bytes(image)) == image.to_bytes()
    True
    """
    data = np.asanyarray(image.dataobj)
    image.update_header()
    header = image.header.copy()
    dtype = image.get_data_dtype()
    header.set_slope_inter(1.0, 0.0)
    head = io.BytesIO()
    header.write_to(head)
    offset = int(header["vox_offset"])
    block = np.asfortranarray(np.asarray(data, dtype=dtype))
    stream = _inflate().compressobj(LABEL_GZIP_LEVEL, zlib.DEFLATED, 31)
    body = stream.compress(head.getvalue() + b"\0" * (offset - head.tell()))
    return body + stream.compress(memoryview(block.T).cast("B")) + stream.flush()
