"""Grayscale path: three-phase labels from a dry reference scan and a wet scan of the same sample.

1. **Solid** from the dry reference: denoise, then split solid from pore by a two-class Otsu
   threshold inside the field of view (or ``solid_threshold``); islands smaller than
   ``min_speck_voxels`` are absorbed by the surrounding phase.
2. **Registration**: the wet scan is aligned to the reference by a rigid integer translation found
   by phase correlation on a central crop (``register_crop`` voxels per axis). Voxels that the shift
   leaves without data are marked excluded.
3. **Fluids**: the wet scan is denoised and its pore voxels split by a two-class Otsu threshold of
   the pore voxels only (or ``fluid_threshold``); specks of either fluid smaller than
   ``min_speck_voxels`` (26-connected) are given to the other fluid.

Everything is held in memory (float32 work arrays ≈ 12 bytes per voxel of the scan): segmentation
is for scans that fit, typically cropped sub-volumes; pre-segmented labels take the streaming path.
Known bias: pore voxels next to the solid carry partial-volume grey values and lean toward the fluid
whose grey value is closer to the solid's.

References
----------
Otsu, N. (1979). A threshold selection method from gray-level histograms. *IEEE Transactions on
Systems, Man, and Cybernetics* 9(1), 62–66.
Kuglin, C. D. & Hines, D. C. (1975). The phase correlation image alignment method. *Proc. IEEE
Conference on Cybernetics and Society*, 163–165.
Buades, A., Coll, B. & Morel, J.-M. (2005). A non-local algorithm for image denoising. *CVPR 2005*,
60–65.
"""

from __future__ import annotations

import numpy as np
from scipy import ndimage

from ._codes import EXCLUDED, NONWETTING, SOLID, WETTING
from ._errors import WetpathError

__all__ = ["denoise_volume", "register_translation", "segment_grayscale"]

_DENOISERS = ("none", "median", "gaussian", "nlmeans")


def denoise_volume(image: np.ndarray, method: str = "median", size: float = 3) -> np.ndarray:
    """Denoise a grayscale volume; returns float32.

    ``method``: ``"none"``; ``"median"`` (window ``size`` voxels, robust to salt noise, keeps
    edges); ``"gaussian"`` (σ = ``size`` voxels, fast, blurs edges); ``"nlmeans"`` (non-local means
    of Buades et al. 2005 with patch 3 and search distance ``size``; best edges, slowest).
    """
    image = np.asarray(image, dtype=np.float32)
    if method == "none":
        return image
    if method == "median":
        return ndimage.median_filter(image, size=max(1, int(round(size))))
    if method == "gaussian":
        return ndimage.gaussian_filter(image, sigma=float(size))
    if method == "nlmeans":
        from skimage.restoration import denoise_nl_means, estimate_sigma

        sigma = float(estimate_sigma(image))
        return denoise_nl_means(image, h=0.8 * sigma, sigma=sigma, patch_size=3,
                                patch_distance=max(1, int(size)), fast_mode=True
                                ).astype(np.float32)
    raise WetpathError(f"denoise must be one of {', '.join(_DENOISERS)}, not {method!r}",
                       step="segment")


def _central(shape, crop):
    return tuple(slice(max(0, (n - crop) // 2), max(0, (n - crop) // 2) + min(n, crop))
                 for n in shape)


def register_translation(reference: np.ndarray, moving: np.ndarray, *, crop: int = 128
                         ) -> tuple[int, int, int]:
    """Integer (z, y, x) shift that aligns ``moving`` to ``reference`` (phase correlation).

    Apply it as ``ndimage.shift(moving, shift)``. Computed on the central ``crop``³ voxels.

    References
    ----------
    Kuglin & Hines (1975); scikit-image ``registration.phase_cross_correlation``.
    """
    from skimage.registration import phase_cross_correlation

    box = _central(reference.shape, crop)
    shift, _, _ = phase_cross_correlation(np.asarray(reference[box], np.float32),
                                          np.asarray(moving[box], np.float32),
                                          normalization=None)
    return tuple(int(round(s)) for s in shift)


def _cylinder_fov(shape) -> np.ndarray:
    y = np.arange(shape[1]) - (shape[1] - 1) / 2
    x = np.arange(shape[2]) - (shape[2] - 1) / 2
    r = (min(shape[1], shape[2]) - 1) / 2
    return np.broadcast_to((y[:, None] ** 2 + x[None, :] ** 2 <= r * r)[None], shape)


def _remove_specks(mask: np.ndarray, min_voxels: int) -> np.ndarray:
    """Voxels of ``mask`` in 26-connected components smaller than ``min_voxels``."""
    if min_voxels <= 1 or not mask.any():
        return np.zeros_like(mask)
    lab, n = ndimage.label(mask, structure=np.ones((3, 3, 3), bool))
    sizes = np.bincount(lab.ravel(), minlength=n + 1)
    small = sizes < min_voxels
    small[0] = False
    return small[lab]


def _threshold(values: np.ndarray, fixed, what: str) -> float:
    from skimage.filters import threshold_otsu

    if fixed is not None:
        return float(fixed)
    if values.size == 0 or values.min() == values.max():
        raise WetpathError(f"cannot split {what}: no contrast inside the region", step="segment")
    return float(threshold_otsu(values))


def segment_grayscale(wet: np.ndarray, dry: np.ndarray, *, register: bool = True,
                      register_crop: int = 128, denoise: str = "median",
                      denoise_size: float = 3, solid_is_bright: bool = True,
                      wetting_is_bright: bool = True, solid_threshold: float | None = None,
                      fluid_threshold: float | None = None, min_speck_voxels: int = 8,
                      field_of_view: str = "cylinder") -> np.ndarray:
    """Three-phase canonical labels from a wet scan and the dry reference scan.

    Parameters
    ----------
    wet, dry : ndarray (z, y, x)
        Grayscale scans of the same sample, same shape; the dry scan is the reference frame.
    register : bool
        Align the wet scan to the reference by a rigid integer translation (phase correlation).
    register_crop : int
        Edge (voxels) of the central crop used for the correlation; larger is more robust, slower.
    denoise : {"none", "median", "gaussian", "nlmeans"}
        Denoising filter applied to both scans before thresholding (see :func:`denoise_volume`).
    denoise_size : float
        Median window / Gaussian σ / non-local-means search distance, in voxels.
    solid_is_bright, wetting_is_bright : bool
        Which side of each threshold is solid (dry scan) and wetting fluid (wet scan).
    solid_threshold, fluid_threshold : float, optional
        Fixed grey-value thresholds; default two-class Otsu (solid: inside the field of view;
        fluids: inside the pore space only).
    min_speck_voxels : int
        Connected specks smaller than this (26-connectivity) are absorbed: solid islands in pore
        become pore and vice versa; wetting specks become non-wetting and vice versa. 0 keeps all.
    field_of_view : {"cylinder", "full"}
        ``"cylinder"``: inscribed cylinder with axis z (voxels outside are excluded, code 0).

    Returns
    -------
    ndarray of uint8
        Canonical codes 0 excluded, 1 solid, 2 wetting, 3 non-wetting.

    References
    ----------
    Otsu (1979); Kuglin & Hines (1975); Buades, Coll & Morel (2005) (see module docstring).
    """
    wet, dry = np.asarray(wet), np.asarray(dry)
    if wet.shape != dry.shape or wet.ndim != 3:
        raise WetpathError(f"wet scan {wet.shape} and dry reference {dry.shape} must be 3D of the "
                           "same shape", step="segment")
    if field_of_view not in ("cylinder", "full"):
        raise WetpathError(f"field_of_view must be 'cylinder' or 'full', not {field_of_view!r}",
                           step="segment")
    fov = _cylinder_fov(wet.shape).copy() if field_of_view == "cylinder" else np.ones(wet.shape,
                                                                                      bool)
    dry_f = denoise_volume(dry, denoise, denoise_size)
    t_s = _threshold(dry_f[fov], solid_threshold, "solid from pore")
    solid = (dry_f > t_s) if solid_is_bright else (dry_f < t_s)
    solid &= fov
    solid ^= _remove_specks(solid, min_speck_voxels) | _remove_specks(fov & ~solid,
                                                                      min_speck_voxels)
    if register:
        shift = register_translation(dry_f, np.asarray(wet, np.float32), crop=register_crop)
        if any(shift):
            wet = ndimage.shift(np.asarray(wet, np.float32), shift, order=0, mode="nearest")
            for axis, s in enumerate(shift):  # planes the shift filled by repetition: no data
                index = [slice(None)] * 3
                index[axis] = slice(0, s) if s > 0 else slice(wet.shape[axis] + s, None)
                if s:
                    fov[tuple(index)] = False
    wet_f = denoise_volume(wet, denoise, denoise_size)
    pore = fov & ~solid
    t_f = _threshold(wet_f[pore], fluid_threshold, "the fluids")
    wetting = pore & ((wet_f > t_f) if wetting_is_bright else (wet_f < t_f))
    nonwetting = pore & ~wetting
    flip_n = _remove_specks(nonwetting, min_speck_voxels)
    flip_w = _remove_specks(wetting, min_speck_voxels)
    wetting = (wetting & ~flip_w) | flip_n
    out = np.full(wet.shape, EXCLUDED, np.uint8)
    out[pore] = NONWETTING
    out[wetting] = WETTING
    out[solid & fov] = SOLID
    return out
