"""Research-pipeline steps applied to reconstructed images, and 8-bit archives.

Volumes are ``(Z, ny, nx)``; voxel sizes are (z, y, x) in millimetres.
"""

from __future__ import annotations

import io

import numpy as np
from scipy import ndimage


def register_to_grid(vol: np.ndarray, voxel: tuple[float, float], *, target_mm: float = 1.0,
                     angle_deg: float = 0.0, order: int = 1) -> np.ndarray:
    """Resample each slice onto a ``target_mm`` grid, with an in-plane rotation.

    ``order`` 1 is (bi/tri)linear interpolation, 3 the cubic B-spline of
    ``scipy.ndimage.affine_transform`` (with its spline prefilter). Samples from
    outside the input are zero, as registration tools write them.

    References
    ----------
    M. Unser, "Splines: a perfect fit for signal and image processing", IEEE
    Signal Process. Mag. 16 (1999) 22-38.
    """
    fy, fx = voxel[0] / target_mm, voxel[1] / target_mm
    ny, nx = vol.shape[-2:]
    oy, ox = int(round(ny * fy)), int(round(nx * fx))
    th = np.deg2rad(angle_deg)
    rot = np.array([[np.cos(th), -np.sin(th)], [np.sin(th), np.cos(th)]])
    mat = rot @ np.diag([1 / fy, 1 / fx])
    c_in = np.array([(ny - 1) / 2, (nx - 1) / 2])
    c_out = np.array([(oy - 1) / 2, (ox - 1) / 2])
    offset = c_in - mat @ c_out
    return np.stack([ndimage.affine_transform(s, mat, offset, output_shape=(oy, ox), order=order,
                                              mode="constant", cval=0.0) for s in vol])


def reslice_coronal(vol: np.ndarray, voxel: tuple[float, float, float], *,
                    target_mm: float = 1.0, order: int = 1) -> np.ndarray:
    """Through-plane reslicing of a 3D volume (z, y, x) to (y, z', x) at ``target_mm`` along z.

    References
    ----------
    M. Unser, IEEE Signal Process. Mag. 16 (1999) 22-38 (spline interpolation).
    """
    fz = voxel[0] / target_mm
    nz = vol.shape[0]
    oz = int(round(nz * fz))
    z = (np.arange(oz) - (oz - 1) / 2) / fz + (nz - 1) / 2
    zz = np.broadcast_to(z[:, None, None], (oz,) + vol.shape[1:])
    yy, xx = np.meshgrid(np.arange(vol.shape[1]), np.arange(vol.shape[2]), indexing="ij")
    coords = np.stack([zz, np.broadcast_to(yy, zz.shape), np.broadcast_to(xx, zz.shape)])
    out = ndimage.map_coordinates(vol, coords, order=order, mode="nearest")
    return np.ascontiguousarray(out.transpose(1, 0, 2))


def skull_strip(vol: np.ndarray, support: np.ndarray, *, erode: int = 3) -> np.ndarray:
    """Set everything outside an eroded object mask to exactly zero.

    References
    ----------
    Common practice, no source (brain extraction writes zeros outside the mask).
    """
    mask = np.stack([ndimage.binary_erosion(s, iterations=erode) for s in support])
    return np.where(mask, vol, 0.0).astype(vol.dtype)


def bias_correct(vol: np.ndarray, support: np.ndarray, *, sigma_px: float = 12.0) -> np.ndarray:
    """Divide by a smooth field estimated by normalised Gaussian smoothing inside the object.

    References
    ----------
    H. Knutsson and C.-F. Westin, "Normalized and differential convolution",
    Proc. CVPR (1993) 515-523 (normalised convolution for the field estimate).
    """
    out = np.empty_like(vol, dtype=np.float32)
    for i, (s, m) in enumerate(zip(vol, support, strict=True)):
        num = ndimage.gaussian_filter(s * m, sigma_px)
        den = ndimage.gaussian_filter(m.astype(float), sigma_px)
        field = num / np.maximum(den, 1e-3)
        ref = np.median(field[m]) if m.any() else field.mean()
        field = np.maximum(field / ref, 0.3)
        out[i] = s / field
    return out


def zscore(vol: np.ndarray, support: np.ndarray) -> np.ndarray:
    """(x - mean) / sd with the statistics taken inside the object (common practice, no source)."""
    m = vol[support]
    return ((vol - m.mean()) / m.std()).astype(np.float32)


def minmax(vol: np.ndarray) -> np.ndarray:
    """Rescale to [0, 1] by the volume's minimum and maximum (common practice, no source)."""
    return ((vol - vol.min()) / (vol.max() - vol.min())).astype(np.float32)


def to_uint8(vol: np.ndarray, *, percentile: float = 99.5) -> np.ndarray:
    """Window to [0, p-th percentile] and quantise to 8 bits (clips the brightest voxels).

    References
    ----------
    Common practice, no source (display windowing before 8-bit export).
    """
    top = np.percentile(vol, percentile)
    return np.clip(np.round(vol / top * 255.0), 0, 255).astype(np.uint8)


RESAMPLE_FILTERS = ("nearest", "bilinear", "bicubic", "lanczos")


def pillow_archive(img8: np.ndarray, *, fmt: str, quality: int = 90, size: tuple[int, int] |
                   None = None, resample: str = "bicubic") -> bytes:
    """Encode one uint8 slice as PNG or baseline JPEG with Pillow, resized first if asked.

    References
    ----------
    ITU-T T.81 | ISO/IEC 10918-1 (JPEG baseline, via libjpeg in Pillow); W3C PNG
    specification; Pillow's ``Image.resize`` filters.
    """
    from PIL import Image

    im = Image.fromarray(np.ascontiguousarray(img8), "L")
    if size is not None:
        im = im.resize((size[1], size[0]), getattr(Image.Resampling, resample.upper()))
    buf = io.BytesIO()
    if fmt == "jpeg":
        im.save(buf, "JPEG", quality=int(quality))
    else:
        im.save(buf, "PNG")
    return buf.getvalue()
