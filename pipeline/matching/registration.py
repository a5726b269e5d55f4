"""Rigid registration of one session's image to another's with SimpleITK.

The transform is a 3D Euler (rotation + translation) transform, initialised by
``CenteredTransformInitializer`` (image geometry centres), optimised by regular-step gradient
descent (largest step 4 mm, step relaxation 0.7, scales from physical shift) on Mattes mutual
information over a three-level pyramid (shrink 4/2/1, smoothing 2/1/0 mm). References: Mattes D
et al., IEEE TMI 2003;22:120-128 (Mattes MI); Maes F et al., IEEE TMI 1997;16:187-198 (mutual
information for multimodality registration).

Geometry has one source: the nibabel-style RAS+ affine. ITK works in LPS with arrays indexed
(z, y, x); every conversion goes through ``to_sitk``/``affine_from_sitk``/``matrix_to_ras``
and the constant ``geometry.LPS_TO_RAS`` (``A_ras = LPS_TO_RAS @ A_lps``, ``diag(-1, -1, 1, 1)``,
its own inverse).
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import SimpleITK as sitk

from pipeline.errors import InputError
from pipeline.geometry import LPS_TO_RAS, itk_affine_ras, ras_to_itk_geometry


@dataclass(frozen=True)
class RigidResult:
    """A rigid registration of a moving session's image to a fixed session's image.

    ``matrix_ras`` (4, 4) maps moving-session world coordinates (RAS+ mm) to the fixed session's
    world; ``metric_value`` is the final Mattes mutual information (negative; lower is better);
    ``quality`` the Pearson correlation of the fixed image with the registered moving image
    over the fixed image's foreground (1 = identical up to scale), ``quality_before`` the same
    without registration; ``iterations`` the optimizer iterations of the last level.
    """

    matrix_ras: np.ndarray
    metric_value: float
    quality: float
    quality_before: float
    iterations: int
    stop_condition: str


def to_sitk(array: np.ndarray, affine: np.ndarray) -> sitk.Image:
    """A SimpleITK image from an (x, y, z) array and its voxel -> RAS+ affine.

    Examples
    --------
    >>> affine = np.array([[-2., 0, 0, 10], [0, 0, 3, -5], [0, 1, 0, 7], [0, 0, 0, 1]])
    >>> image = to_sitk(np.zeros((4, 5, 6), np.float32), affine)
    >>> image.GetSize(), np.allclose(affine_from_sitk(image), affine)
    ((4, 5, 6), True)
    """
    origin, spacing, direction = ras_to_itk_geometry(affine)
    cosines = np.asarray(direction).reshape(3, 3)
    if not np.allclose(cosines.T @ cosines, np.eye(3), atol=1e-6):
        raise InputError("the image affine has shear; rigid registration needs orthogonal axes",
                         stage="register")
    data = np.asarray(array)
    data = data.astype(data.dtype.newbyteorder("="), copy=False)   # ITK needs native order
    image = sitk.GetImageFromArray(np.ascontiguousarray(data.transpose(2, 1, 0)))
    image.SetSpacing(spacing)
    image.SetDirection(direction)
    image.SetOrigin(origin)
    return image


def affine_from_sitk(image: sitk.Image) -> np.ndarray:
    """The voxel (x, y, z index) -> RAS+ affine of a SimpleITK image (``itk_io.itk_affine_ras``)."""
    return itk_affine_ras(image)


def matrix_to_ras(transform: sitk.Transform) -> np.ndarray:
    """The 4x4 RAS -> RAS matrix of an affine-type ITK transform (which maps LPS -> LPS points).

    Examples
    --------
    >>> shift = sitk.TranslationTransform(3, (1.0, 2.0, 3.0))
    >>> matrix_to_ras(shift)[:3, 3].tolist()
    [-1.0, -2.0, 3.0]
    """
    origin = np.array(transform.TransformPoint((0.0, 0.0, 0.0)))
    lps = np.eye(4)
    for axis in range(3):
        unit = [0.0, 0.0, 0.0]
        unit[axis] = 1.0
        lps[:3, axis] = np.array(transform.TransformPoint(tuple(unit))) - origin
    lps[:3, 3] = origin
    return LPS_TO_RAS @ lps @ LPS_TO_RAS


def _correlation(fixed: sitk.Image, moving: sitk.Image, transform: sitk.Transform) -> float:
    moved = sitk.GetArrayFromImage(sitk.Resample(moving, fixed, transform, sitk.sitkLinear, 0.0))
    target = sitk.GetArrayFromImage(fixed)
    mask = target > 0.1 * float(target.max()) if target.max() > 0 else target == target
    if mask.sum() < 2 or moved[mask].std() == 0 or target[mask].std() == 0:
        return float("nan")
    return float(np.corrcoef(target[mask].ravel(), moved[mask].ravel())[0, 1])


def rigid_register(fixed: np.ndarray, fixed_affine: np.ndarray, moving: np.ndarray,
                   moving_affine: np.ndarray, *, iterations: int = 100, bins: int = 50,
                   sampling: float = 0.2, seed: int = 1) -> RigidResult:
    """Rigidly register ``moving`` to ``fixed`` (both (x, y, z) arrays with RAS+ affines).

    Parameters
    ----------
    fixed, moving : (X, Y, Z) ndarray
        Intensity images (for example the contrast T1 each mask was drawn on).
    fixed_affine, moving_affine : (4, 4) ndarray
        Voxel -> RAS+ mm.
    iterations : int
        Gradient-descent iterations per pyramid level.
    bins : int
        Histogram bins of Mattes mutual information.
    sampling : float
        Fraction of voxels sampled (random, seeded: the result is reproducible).

    Returns
    -------
    RigidResult
        ``matrix_ras`` maps moving-session world points into the fixed session's world, ready
        for ``match_subject(..., transforms={session: matrix_ras})``.
    """
    fixed_image = sitk.Cast(to_sitk(fixed, fixed_affine), sitk.sitkFloat32)
    moving_image = sitk.Cast(to_sitk(moving, moving_affine), sitk.sitkFloat32)
    initial = sitk.CenteredTransformInitializer(
        fixed_image, moving_image, sitk.Euler3DTransform(),
        sitk.CenteredTransformInitializerFilter.GEOMETRY)
    method = sitk.ImageRegistrationMethod()
    method.SetMetricAsMattesMutualInformation(numberOfHistogramBins=bins)
    method.SetMetricSamplingStrategy(method.RANDOM)
    method.SetMetricSamplingPercentage(sampling, seed)
    method.SetInterpolator(sitk.sitkLinear)
    method.SetOptimizerAsRegularStepGradientDescent(
        learningRate=4.0, minStep=1e-4, numberOfIterations=iterations, relaxationFactor=0.7,
        gradientMagnitudeTolerance=1e-8)
    method.SetOptimizerScalesFromPhysicalShift()
    method.SetShrinkFactorsPerLevel([4, 2, 1])
    method.SetSmoothingSigmasPerLevel([2.0, 1.0, 0.0])
    method.SmoothingSigmasAreSpecifiedInPhysicalUnitsOn()
    method.SetInitialTransform(initial, inPlace=False)
    final = method.Execute(fixed_image, moving_image)
    # ITK's transform maps fixed points to moving points; invert for moving -> fixed.
    fixed_to_moving = matrix_to_ras(final)
    return RigidResult(
        matrix_ras=np.linalg.inv(fixed_to_moving),
        metric_value=float(method.GetMetricValue()),
        quality=_correlation(fixed_image, moving_image, final),
        quality_before=_correlation(fixed_image, moving_image,
                                    sitk.Transform(3, sitk.sitkIdentity)),
        iterations=int(method.GetOptimizerIteration()),
        stop_condition=method.GetOptimizerStopConditionDescription())
