"""Label rules shared by every reader and stage 1: integer labels after header scaling, the
smallest integer type for label images, and which label values count as lesion."""
from __future__ import annotations

import numpy as np

from pipeline.errors import InputError

def integer_labels(data: np.ndarray, slope: float | None, inter: float | None, *,
                   name: str) -> np.ndarray:
    """Label values after header scaling; refuse values that are not integers.

    Examples
    --------
    >>> integer_labels(np.array([0, 2], np.int16), 0.5, 0.0, name="m.nii").tolist()
    [0, 1]
    >>> integer_labels(np.array([0.0, 0.3]), None, None, name="m.nii")
    Traceback (most recent call last):
    ...
    pipeline.errors.InputError: m.nii: labels must be integers; got float64 with value 0.3 ...
    """
    scaled = slope is not None and np.isfinite(slope) and slope != 0 and (slope != 1 or
                                                                         (inter or 0) != 0)
    if scaled:
        values = data.astype(np.float64) * float(slope) + float(inter or 0.0)
        where = " after scl_slope/scl_inter scaling"
    elif data.dtype.kind in "iub":
        return data
    else:
        values, where = data, ""
    finite = np.isfinite(values)
    if not finite.all():
        raise InputError(f"{name}: labels must be finite; the mask holds NaN or infinity",
                         path=name)
    rounded = np.rint(values)
    bad = np.abs(values - rounded) > 1e-6
    if bad.any():
        example = values[bad].flat[0]        # a numpy scalar: str() is its shortest exact form
        raise InputError(f"{name}: labels must be integers{where}; got {data.dtype} with value "
                         f"{str(example)} - is this a probability map? threshold it first",
                         path=name)
    info = np.iinfo(np.int32)
    fits_int32 = info.min <= rounded.min(initial=0) and rounded.max(initial=0) <= info.max
    return rounded.astype(np.int32 if fits_int32 else np.int64)


def label_dtype(max_value: int) -> np.dtype:
    """Smallest integer type for a label image (never int64: other tools break on it).

    >>> label_dtype(3), label_dtype(300), label_dtype(70000)
    (dtype('uint8'), dtype('int16'), dtype('int32'))
    """
    if max_value <= 255:
        return np.dtype(np.uint8)
    if max_value <= 32767:
        return np.dtype(np.int16)
    return np.dtype(np.int32)


def select_labels(data: np.ndarray, labels: tuple[int, ...] | None, *, name: str = "mask"
                  ) -> np.ndarray:
    """Boolean lesion mask: the selected label values merged (all non-zero values by default).

    A label asked for that the mask does not hold, while it holds other non-zero values, is an
    error: the ``labels`` column probably names the wrong values.

    Examples
    --------
    >>> select_labels(np.array([0, 1, 3, 2]), (1, 3)).tolist()
    [False, True, True, False]
    >>> select_labels(np.array([0, 2]), (1,), name="m.nii.gz")
    Traceback (most recent call last):
    ...
    pipeline.errors.InputError: m.nii.gz: label values (1,) asked for, but the mask holds only [2]
    """
    if labels is None:
        return data != 0
    selected = np.isin(data, _label_values(labels, data.dtype))
    if not selected.any() and data.any():
        raise _absent_labels(np.asarray(data).ravel(), labels, name)
    return selected


def _label_values(labels: tuple[int, ...], dtype: np.dtype) -> np.ndarray:
    """The asked-for label values the mask's type can hold (a uint8 mask holds no 300 or -1),
    in that type.

    >>> _label_values((1, 300, -1), np.dtype(np.uint8)).tolist()
    [1]
    """
    if dtype.kind in "iu":
        info = np.iinfo(dtype)
        labels = tuple(v for v in labels if info.min <= v <= info.max)
    elif dtype.kind == "b":
        labels = tuple(v for v in labels if v in (0, 1))
    return np.asarray(labels, dtype=dtype)


def _absent_labels(values: np.ndarray, labels: tuple[int, ...], name: str) -> Exception:
    from pipeline.errors import InputError

    shown = np.unique(values[values != 0])[:10].tolist()
    return InputError(f"{name}: label values {tuple(labels)} asked for, but the mask holds "
                      f"only {shown}", path=name)
