"""What stage 1 returns for one scan (``ScanResult``) and the compact form its component image
travels and is cached in (``SparseImage``)."""
from __future__ import annotations

import dataclasses
import functools
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

import numpy as np

from pipeline.volumes.components import nonzero_flat

if TYPE_CHECKING:
    import pandas as pd


@dataclass(frozen=True, eq=False)
class ScanResult:
    """What stage 1 learns from one mask (picklable, small).

    The component rows travel as plain column arrays (``columns``, volumes.MEASURE_COLUMNS) so
    that a worker never imports pandas; ``table`` is the DataFrame, built on first use.
    """

    subject: str
    session: str
    columns: dict[str, np.ndarray] | None = None
    components: np.ndarray | None = None     # crop-box component image
    offset: tuple[int, int, int] = (0, 0, 0)
    shape: tuple[int, int, int] = (0, 0, 0)
    affine: np.ndarray | None = None         # voxel -> RAS+ mm
    file_affine: np.ndarray | None = None    # as stored, in the file's units
    forms: np.ndarray | None = None          # (2, 4, 4) sform and qform as stored
    form_codes: tuple[int, int] = (1, 1)
    units_code: int = 2
    sha256: str = ""
    warnings: tuple[str, ...] = ()
    error: str = ""
    cached: bool = False

    @property
    def ok(self) -> bool:
        return not self.error

    @functools.cached_property
    def table(self) -> pd.DataFrame | None:
        """The component rows as a DataFrame (None for a failed scan)."""
        if self.columns is None:
            return None
        from pipeline.volumes.components import as_table

        return as_table(self.columns)

    def component_image(self) -> np.ndarray:
        """The crop-box component image, dense (whether kept dense or sparse)."""
        if isinstance(self.components, SparseImage):
            return self.components.array()
        return self.components

    def compact(self) -> ScanResult:
        """The same result with its component image kept sparse (for holding many scans)."""
        if isinstance(self.components, np.ndarray):
            return dataclasses.replace(self, components=SparseImage.of(self.components))
        return self


@dataclass(frozen=True)
class SparseImage:
    """A mostly-zero array as runs of equal non-zero values along its memory order: what a
    worker sends back instead of the crop-box component image, and how stage 1 keeps every
    scan's components in memory and in its cache. A lesion is a few thousand runs, so this is
    tens of kB where the dense box is tens of MB (and a list of voxel indices 5-8x more).
    ``starts`` are flat indices (in ``order``) of each run's first voxel, ascending."""

    shape: tuple[int, ...]
    dtype: str
    order: str
    starts: np.ndarray
    lengths: np.ndarray
    values: np.ndarray

    @classmethod
    def of(cls, array: np.ndarray) -> SparseImage:
        order = "F" if array.flags.f_contiguous and not array.flags.c_contiguous else "C"
        flat = array.ravel(order=order)
        where = nonzero_flat(flat)
        return cls.from_voxels(array.shape, array.dtype, order, where, flat[where])

    @classmethod
    def from_voxels(cls, shape: tuple[int, ...], dtype: Any, order: str, where: np.ndarray,
                    values: np.ndarray) -> SparseImage:
        """From ascending flat indices of the non-zero voxels and their values.

        >>> s = SparseImage.from_voxels((2, 3), np.uint8, "C", np.array([1, 2, 3, 5]),
        ...                             np.array([4, 4, 4, 7]))
        >>> s.starts.tolist(), s.lengths.tolist(), s.values.tolist()
        ([1, 5], [3, 1], [4, 7])
        >>> s.array().tolist()
        [[0, 4, 4], [4, 0, 7]]
        """
        where = np.asarray(where, dtype=np.int64)
        values = np.asarray(values)
        if len(where):
            step = (np.diff(where) != 1) | (values[1:] != values[:-1])
            first = np.flatnonzero(np.r_[True, step])
        else:
            first = np.zeros(0, dtype=np.int64)
        lengths = np.diff(np.r_[first, len(where)])
        size = int(np.prod(shape))
        index_type = np.uint32 if size < 2 ** 32 else np.int64
        return cls(tuple(int(s) for s in shape), np.dtype(dtype).str, order,
                   where[first].astype(index_type), lengths.astype(index_type),
                   values[first].astype(dtype))

    @property
    def where(self) -> np.ndarray:
        """Flat indices of every non-zero voxel, ascending."""
        lengths = self.lengths.astype(np.int64)
        ends = np.cumsum(lengths)
        return np.repeat(self.starts.astype(np.int64) - (ends - lengths), lengths) + \
            np.arange(int(ends[-1]) if len(ends) else 0)

    def array(self) -> np.ndarray:
        flat = np.zeros(int(np.prod(self.shape)), np.dtype(self.dtype))
        flat[self.where] = np.repeat(self.values, self.lengths.astype(np.int64))
        return flat.reshape(self.shape, order=self.order)
