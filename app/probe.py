"""The bias probe: how much retrospective undersampling of a dataset would flatter a method.

A reconstruction study that takes the FFT of delivered images as k-space, drops
samples with a mask and reconstructs, scores its method against those images.
When the images were zero-filled (or partial-Fourier zero-padded), most of that
"k-space" is zeros or a smooth echo, the mask samples the acquired region more
densely than its nominal rate, and the images are smoother than an acquisition:
every method looks better than it would on measured data. The probe measures
by how much, on a few slices, by running the same experiment on two routes:

``as_delivered``
    The centred orthonormal 2D FFT of the delivered images taken as k-space (or
    the delivered k-space itself): what a naive user does.
``support_cropped``
    That k-space cut to the measured support (:mod:`app.crop`: the ``zero_filling``
    box, and the acquired side of a partial-Fourier axis on complex data): the
    route closest to what was acquired.

Method (fixed, so that probes of different datasets compare):

1. ``slices`` evenly spaced frames (:func:`app.traces.context.evenly_spaced`).
   Multi-coil frames are compressed to one virtual coil, the first principal
   component of the coils (a linear map, so k-space stays k-space; Huang et al.
   2008); the probe is single-coil. Each route's k-space grid is trimmed to a
   multiple of 8 samples per axis (even below 64) by dropping its outermost
   samples, at most 7, so that the wavelet transform has 3 or more levels; the
   shapes are reported.
2. One mask per slice from :func:`app.sampling.random_masks` with the family, the
   nominal acceleration ``R`` and the seed: the same seeds on both routes, each
   mask drawn on its route's grid. Default: ``polynomial`` variable density
   (Lustig, Donoho and Pauly 2007), phase-encode lines along ``cols`` with a
   fully sampled centre of 8 % of the lines, seed 0.
3. Each slice's k-space is divided by the peak magnitude of its zero-filled
   reconstruction (the undersampled data only), so that one regularisation
   weight serves every dataset; the metrics below do not depend on the scale.
4. Two reconstructions: (a) the zero-filled inverse FFT; (b) L1-wavelet
   regularised least squares,
   ``min_x 1/2 ||M F x - y||^2 + lam ||Psi x||_1``, ``Psi`` the orthonormal
   Daubechies-4 wavelet transform (PyWavelets, periodic extension, up to 4 levels,
   the coarse approximation not penalised), solved by FISTA (Beck and Teboulle
   2009) in the wavelet domain with step 1 (the Lipschitz constant of the
   gradient is 1: a mask, a unitary FFT and an orthonormal wavelet),
   ``lam = LAMBDA`` (0.01) and ``ITERATIONS`` (60) iterations from the
   zero-filled image. The complex soft-threshold shrinks magnitudes.
5. Metrics on magnitude images against the route's own fully sampled reference
   (the orthonormal inverse FFT of the route's whole k-space), per slice, then
   averaged over slices, with scikit-image: ``normalized_root_mse`` (Euclidean
   normalisation, ``||ref - rec|| / ||ref||``), ``structural_similarity`` and
   ``peak_signal_noise_ratio``, both with ``data_range = ref.max() - ref.min()`` of
   the slice's reference magnitude.
6. The gap of the compressed-sensing reconstruction,
   ``g = (NRMSE_cropped - NRMSE_delivered) / NRMSE_cropped``: positive when the
   delivered images flatter a method (Shimron, Tamir, Wang and Lustig 2022
   report such flattering of tens of percent for zero-filled and
   magnitude-processed data); near zero for raw data, where the crop is the whole
   grid and the routes coincide.
7. Acceleration: ``acceleration`` is the nominal R; each route's
   ``effective_acceleration`` is 1 / the share of the measured support's samples
   that its masks keep (the ``sampling`` command's rule; the cropped route's
   support is its whole grid).

The JSON object (``rawproof probe PATH --json``, and the stored result of the web
app's probe), schema ``rawproof.probe/1``; scripts may rely on these keys, and later
versions only add keys::

    {
      "schema": "rawproof.probe/1",
      "acceleration": 4.0,              # nominal R
      "family": "polynomial",           # mask family of app/sampling.py
      "slices": 8,                      # slices probed
      "routes": {
        "as_delivered":    {"nrmse": x, "ssim": x, "psnr": x,      # CS reconstruction
                            "effective_acceleration": x,
                            "shape": [r, c], "nominal_rate": x,
                            "zero_filled": {"nrmse": x, "ssim": x, "psnr": x}},
        "support_cropped": {... the same keys ...}
      },
      "gap": {"nrmse": g,               # (cropped - delivered) / cropped, CS NRMSE
              "ssim": x, "psnr_db": x}, # delivered minus cropped SSIM, PSNR (dB)
      "seconds": t,                     # wall time of the probe
      "crop": {...},                    # the crop (app.crop.CropSpec.to_dict)
      "method": {...},                  # the fixed parameters above
      "frames": [i, ...],               # flat frame indices probed
      "caution": "..."
    }

References
----------
.. [1] Beck, A. and Teboulle, M. "A fast iterative shrinkage-thresholding algorithm
   for linear inverse problems", SIAM J. Imaging Sci. 2(1):183-202, 2009.
.. [2] Lustig, M., Donoho, D. and Pauly, J. M. "Sparse MRI: the application of
   compressed sensing for rapid MR imaging", Magn. Reson. Med. 58:1182-1195, 2007.
.. [3] Shimron, E., Tamir, J. I., Wang, K. and Lustig, M. "Implicit data crimes:
   machine learning bias arising from misuse of public data", Proc. Natl. Acad.
   Sci. USA 119(13):e2117203119, 2022.
.. [4] Huang, F., Vijayakumar, S., Li, Y., Hertel, S. and Duensing, G. R. "A
   software channel compression technique for faster reconstruction with many
   channels", Magn. Reson. Imaging 26(1):133-141, 2008.
.. [5] Wang, Z., Bovik, A. C., Sheikh, H. R. and Simoncelli, E. P. "Image quality
   assessment: from error visibility to structural similarity", IEEE Trans. Image
   Process. 13(4):600-612, 2004 (SSIM, as scikit-image computes it).
"""

from __future__ import annotations

import time
from collections.abc import Callable, Mapping, Sequence
from typing import Any

import numpy as np
import pywt
from skimage.metrics import normalized_root_mse, peak_signal_noise_ratio, structural_similarity

import app
from app import sampling
from app.crop import CropSpec, crop_kspace, crop_spec, fft2c, ifft2c
from app.errors import InputError

SCHEMA = "rawproof.probe/1"
WAVELET = "db4"
MAX_LEVEL = 4
LAMBDA = 0.01
ITERATIONS = 60
DEFAULT_FAMILY = "polynomial"
DEFAULT_ACCELERATION = 4.0
DEFAULT_SLICES = 8
DEFAULT_PARAMS: dict[str, float] = {"calib": 0.08}
#: the smallest in-plane size the probe reconstructs (SSIM's 7 x 7 window, wavelets)
MIN_SIZE = 16

ProgressFn = Callable[[float, str], None]


# ----- the wavelet operator and FISTA ---------------------------------------------------
class _Wavelet:
    """Orthonormal 2D wavelet transform of a stack ``(n, rows, cols)`` as one array."""

    def __init__(self, shape: tuple[int, int], wavelet: str = WAVELET,
                 level: int | None = None) -> None:
        self.wavelet = wavelet
        self.level = wavelet_level(shape, wavelet) if level is None else int(level)
        probe = pywt.wavedec2(np.zeros(shape), wavelet, mode="periodization",
                              level=self.level)
        arr, self.slices = pywt.coeffs_to_array(probe)
        if arr.shape != tuple(shape):
            raise InputError("bad_shape", f"the wavelet transform needs sizes divisible by "
                             f"2**{self.level}; got {shape}")
        self.penalised = np.ones(shape, dtype=bool)
        self.penalised[self.slices[0]] = False
        self.stack_slices = [tuple([slice(None)] + list(s)) if isinstance(s, tuple) else
                             {k: (slice(None),) + v for k, v in s.items()}
                             for s in self.slices]

    def forward(self, x: np.ndarray) -> np.ndarray:
        c = pywt.wavedec2(x, self.wavelet, mode="periodization", level=self.level,
                          axes=(-2, -1))
        arr, _ = pywt.coeffs_to_array(c, axes=(-2, -1))
        return arr

    def inverse(self, a: np.ndarray) -> np.ndarray:
        c = pywt.array_to_coeffs(a, self.stack_slices, output_format="wavedec2")
        return pywt.waverec2(c, self.wavelet, mode="periodization", axes=(-2, -1))


def wavelet_level(shape: Sequence[int], wavelet: str = WAVELET) -> int:
    """Levels of the probe's wavelet transform on a grid: at most :data:`MAX_LEVEL`,
    no more than both sizes can be halved evenly or PyWavelets advises."""
    lv = MAX_LEVEL
    for n in shape:
        n = int(n)
        twos = (n & -n).bit_length() - 1 if n > 0 else 0
        lv = min(lv, twos, pywt.dwt_max_level(n, pywt.Wavelet(wavelet).dec_len))
    if lv < 1:
        raise InputError("bad_shape", f"the probe needs even image sizes, not {tuple(shape)}")
    return lv


def soft_threshold(z: np.ndarray, threshold: float) -> np.ndarray:
    """Complex soft-thresholding: shrink magnitudes by ``threshold``, keep phases.

    The proximal map of ``threshold * |z|_1`` (for complex ``z``, of the sum of
    magnitudes).

    References
    ----------
    .. [1] Donoho, D. L. "De-noising by soft-thresholding", IEEE Trans. Inf. Theory
       41(3):613-627, 1995.
    """
    mag = np.abs(z)
    scale = np.maximum(0.0, 1.0 - threshold / np.maximum(mag, np.finfo(mag.dtype).tiny))
    return z * scale.astype(mag.dtype)


def fista_l1_wavelet(
    kspace: np.ndarray,
    mask: np.ndarray,
    *,
    lam: float = LAMBDA,
    iterations: int = ITERATIONS,
    wavelet: str = WAVELET,
    level: int | None = None,
    workers: int = 1,
) -> np.ndarray:
    """L1-wavelet regularised least squares by FISTA, for a stack of single-coil slices.

    Solves ``min_z 1/2 ||M F Psi^T z - y||^2 + lam ||z_d||_1`` and returns
    ``x = Psi^T z``, where ``F`` is the centred orthonormal 2D FFT, ``M`` the mask,
    ``Psi`` an orthonormal periodic wavelet transform and ``z_d`` its detail
    coefficients (the coarse approximation is not penalised).

    Parameters
    ----------
    kspace : ndarray, ``(n, rows, cols)`` or ``(rows, cols)``, complex
        Centred k-space (DC at ``n // 2``); values outside the mask are ignored.
    mask : ndarray of bool, broadcastable to ``kspace``
    lam : float
        Regularisation weight.
    iterations : int
        FISTA iterations, from the zero-filled image.
    wavelet : str
        A PyWavelets orthogonal wavelet name.
    level : int, optional
        Decomposition levels (default :func:`wavelet_level`).
    workers : int
        Threads of scipy.fft.

    Returns
    -------
    ndarray
        The reconstructed complex images, the shape of ``kspace``.

    References
    ----------
    .. [1] Beck and Teboulle, SIAM J. Imaging Sci. 2:183-202, 2009 (FISTA, step 1/L).
    .. [2] Lustig, Donoho and Pauly, Magn. Reson. Med. 58:1182-1195, 2007.
    """
    y = np.asarray(kspace)
    squeeze = y.ndim == 2
    if squeeze:
        y = y[None]
    m = np.broadcast_to(np.asarray(mask, dtype=bool), y.shape)
    y = np.where(m, y, 0).astype(np.complex128 if y.dtype == np.complex128 else np.complex64)
    op = _Wavelet(y.shape[-2:], wavelet, level)
    pen = op.penalised
    z = op.forward(ifft2c(y, workers=workers))
    v = z.copy()
    t = 1.0
    for _ in range(int(iterations)):
        x = op.inverse(v)
        resid = np.where(m, fft2c(x, workers=workers) - y, 0)
        w = v - op.forward(ifft2c(resid, workers=workers))
        z_new = np.where(pen, soft_threshold(w, lam), w)
        t_new = (1.0 + np.sqrt(1.0 + 4.0 * t * t)) / 2.0
        v = z_new + ((t - 1.0) / t_new) * (z_new - z)
        z, t = z_new, t_new
    x = op.inverse(z).astype(y.dtype, copy=False)
    return x[0] if squeeze else x


# ----- metrics --------------------------------------------------------------------------
def image_metrics(reference: np.ndarray, reconstruction: np.ndarray) -> dict[str, float]:
    """NRMSE, SSIM and PSNR of magnitude images, per slice then averaged.

    scikit-image's ``normalized_root_mse`` (Euclidean normalisation),
    ``structural_similarity`` and ``peak_signal_noise_ratio``; the data range of
    SSIM and PSNR is ``ref.max() - ref.min()`` of each slice's reference magnitude.

    Parameters
    ----------
    reference, reconstruction : ndarray, ``(n, rows, cols)`` or ``(rows, cols)``

    Returns
    -------
    dict
        ``nrmse``, ``ssim``, ``psnr`` (dB): means over slices.

    References
    ----------
    .. [1] Wang, Bovik, Sheikh and Simoncelli, IEEE Trans. Image Process. 13:600-612,
       2004 (SSIM).
    """
    ref = np.abs(np.asarray(reference))
    rec = np.abs(np.asarray(reconstruction))
    if ref.ndim == 2:
        ref, rec = ref[None], rec[None]
    out: dict[str, list[float]] = {"nrmse": [], "ssim": [], "psnr": []}
    for a, b in zip(ref.astype(np.float64), rec.astype(np.float64), strict=True):
        rng = float(a.max() - a.min()) or 1.0
        out["nrmse"].append(float(normalized_root_mse(a, b)))
        out["ssim"].append(float(structural_similarity(a, b, data_range=rng)))
        out["psnr"].append(float(peak_signal_noise_ratio(a, b, data_range=rng)))
    return {k: float(np.mean(v)) for k, v in out.items()}


# ----- preparing the frames -------------------------------------------------------------
def virtual_coil(frames: np.ndarray) -> np.ndarray:
    """Compress ``(n, coils, rows, cols)`` to one virtual coil per slice ``(n, rows, cols)``.

    Each slice is projected on the first eigenvector of its coil covariance (the
    channel combination that keeps the most energy; linear, so k-space stays
    k-space and image-domain data stay complex).

    References
    ----------
    .. [1] Huang, Vijayakumar, Li, Hertel and Duensing, Magn. Reson. Imaging
       26:133-141, 2008.
    """
    f = np.asarray(frames)
    out = np.empty((f.shape[0],) + f.shape[-2:], dtype=np.complex64)
    for i, s in enumerate(f):
        flat = s.reshape(s.shape[0], -1).astype(np.complex128)
        cov = flat @ flat.conj().T
        _, vecs = np.linalg.eigh(cov)
        u = vecs[:, -1]
        out[i] = (u.conj() @ flat).reshape(s.shape[-2:]).astype(np.complex64)
    return out


def trimmed_size(n: int) -> int:
    """The size an axis of ``n`` samples is trimmed to: a multiple of 8 from 64 samples
    (3 wavelet levels; at most 7 outermost samples dropped), else even."""
    return n - n % 8 if n >= 64 else n - n % 2


def _trim(k: np.ndarray) -> np.ndarray:
    """Trim the k-space grid to :func:`trimmed_size`, keeping the outermost samples out
    and DC at ``n // 2`` (:func:`app.sampling.central_slice`)."""
    r, c = k.shape[-2:]
    return k[..., sampling.central_slice(r, trimmed_size(r)),
             sampling.central_slice(c, trimmed_size(c))]


def _box_rate(masks: list[np.ndarray], support: np.ndarray) -> dict[str, float]:
    kept = [float(m[support].mean()) for m in masks]
    nominal = [float(m.mean()) for m in masks]
    rate = float(np.mean(kept))
    return {"nominal_rate": float(np.mean(nominal)),
            "effective_acceleration": 1.0 / rate if rate > 0 else float("inf")}


def _route(kspace: np.ndarray, box: tuple[slice, slice], *, family: str, acceleration: float,
           dims: int, axis: str, seed: int, params: Mapping[str, float], workers: int,
           lam: float, iterations: int) -> dict[str, Any]:
    k = _trim(kspace)
    shape = k.shape[-2:]
    support = np.zeros(kspace.shape[-2:], dtype=bool)
    support[box] = True
    support = _trim(support)
    if min(shape) < MIN_SIZE:
        raise InputError("too_small", f"the probe needs at least {MIN_SIZE} x {MIN_SIZE} "
                         f"samples on each route; this one has {shape[0]} x {shape[1]}")
    masks = sampling.random_masks(shape, family, acceleration, dims=dims, axis=axis,
                                  n_masks=k.shape[0], seed=seed, **params)
    m = np.stack(masks)
    ref = ifft2c(k, workers=workers)
    zf = ifft2c(np.where(m, k, 0), workers=workers)
    scale = np.abs(zf).reshape(len(zf), -1).max(axis=1)
    scale = np.where(scale > 0, scale, 1.0).astype(np.float32)[:, None, None]
    k = k / scale
    ref = ref / scale
    zf = zf / scale
    cs = fista_l1_wavelet(k, m, lam=lam, iterations=iterations, workers=workers)
    out = image_metrics(ref, cs)
    out.update(_box_rate(masks, support))
    out["shape"] = [int(shape[0]), int(shape[1])]
    out["zero_filled"] = image_metrics(ref, zf)
    return out


def probe_kspace(
    kspace: np.ndarray,
    spec: CropSpec,
    *,
    acceleration: float = DEFAULT_ACCELERATION,
    family: str = DEFAULT_FAMILY,
    dims: int = 1,
    axis: str = "cols",
    seed: int = 0,
    params: Mapping[str, float] | None = None,
    lam: float = LAMBDA,
    iterations: int = ITERATIONS,
    workers: int = 1,
    progress: ProgressFn | None = None,
) -> dict[str, Any]:
    """The probe on delivered single-coil k-space ``(n, rows, cols)`` (module docstring).

    Parameters
    ----------
    kspace : ndarray
        Centred k-space of the probed slices as delivered (the FFT of the images).
    spec : CropSpec
        The measured support crop (:func:`app.crop.crop_spec`).
    acceleration, family, dims, axis, seed, params
        The masks (:func:`app.sampling.random_masks`); ``params`` default
        ``{"calib": 0.08}`` where the family takes it.
    lam, iterations
        FISTA's regularisation weight and iteration count.

    Returns
    -------
    dict
        The ``rawproof.probe/1`` object without ``seconds`` and ``frames``.

    References
    ----------
    .. [1] Shimron, Tamir, Wang and Lustig, PNAS 119:e2117203119, 2022.
    .. [2] Beck and Teboulle, SIAM J. Imaging Sci. 2:183-202, 2009.
    """
    k = np.asarray(kspace)
    if k.ndim == 2:
        k = k[None]
    if k.ndim != 3:
        raise InputError("bad_shape", "the probe takes single-coil k-space (slices, rows, cols)")
    p = dict(DEFAULT_PARAMS if params is None else params)
    if params is None and "calib" not in sampling.default_parameters(family):
        p = {}
    sampling.default_parameters(family)  # raises for an unknown family
    common = {"family": family, "acceleration": float(acceleration), "dims": dims,
              "axis": axis, "seed": seed, "params": p, "workers": workers, "lam": lam,
              "iterations": iterations}

    def say(frac: float, text: str) -> None:
        if progress is not None:
            progress(frac, text)

    say(0.05, "reconstructing the delivered route")
    box = (slice(spec.rows.start, spec.rows.stop), slice(spec.cols.start, spec.cols.stop))
    delivered = _route(k, box, **common)
    say(0.55, "reconstructing the support-cropped route")
    cropped_k = crop_kspace(k, spec)
    cropped = _route(cropped_k, (slice(None), slice(None)), **common)
    say(1.0, "done")
    gap = (cropped["nrmse"] - delivered["nrmse"]) / cropped["nrmse"] if cropped["nrmse"] > 0 \
        else 0.0
    return {
        "schema": SCHEMA,
        "acceleration": float(acceleration),
        "family": family,
        "slices": int(k.shape[0]),
        "routes": {"as_delivered": delivered, "support_cropped": cropped},
        "gap": {"nrmse": float(gap),
                "ssim": float(delivered["ssim"] - cropped["ssim"]),
                "psnr_db": float(delivered["psnr"] - cropped["psnr"])},
        "crop": spec.to_dict(),
        "method": {"reconstruction": "L1-wavelet least squares, FISTA (Beck and Teboulle 2009)",
                   "wavelet": WAVELET, "max_level": MAX_LEVEL, "lambda": lam,
                   "iterations": int(iterations), "step": 1.0,
                   "normalisation": "k-space divided by the peak of the zero-filled image",
                   "dims": dims, "axis": axis if dims == 1 else None, "seed": seed,
                   "params": p,
                   "metrics": "scikit-image on magnitude images; data_range = reference "
                              "max - min per slice; means over slices"},
        "caution": app.CAUTION,
    }


def frames_kspace(volume: Any, indices: Sequence[int], *, workers: int = 1) -> np.ndarray:
    """Single-coil delivered k-space of some frames of a Volume ``(n, rows, cols)``."""
    blocks = [b for _, b in volume.iter_slices(len(indices) or 1, indices=indices)]
    f = np.concatenate(blocks, axis=0)
    if volume.coil_axis is not None:
        if volume.domain == "kspace":
            return virtual_coil(f)
        f = virtual_coil(f.astype(np.complex64))
    if volume.domain == "kspace":
        return f.astype(np.complex64, copy=False)
    return fft2c(f.astype(np.complex64), workers=workers)


def probe_volume(volume: Any, traces: Mapping[str, Any], *, slices: int = DEFAULT_SLICES,
                 workers: int = 1, progress: ProgressFn | None = None,
                 **kwargs: Any) -> dict[str, Any]:
    """The probe on ``slices`` evenly spaced frames of a Volume, cropped by ``traces``.

    ``traces`` are contract-shaped (a report's ``traces``); keyword arguments are
    those of :func:`probe_kspace`.
    """
    from app.traces.context import evenly_spaced

    t0 = time.perf_counter()
    if int(slices) < 1:
        raise InputError("bad_value", "--slices must be at least 1")
    idx = evenly_spaced(np.arange(volume.n_slices), int(slices))
    spec = crop_spec(volume.image_shape, traces)
    k = frames_kspace(volume, idx, workers=workers)
    out = probe_kspace(k, spec, workers=workers, progress=progress, **kwargs)
    out["frames"] = [int(i) for i in idx]
    out["seconds"] = round(time.perf_counter() - t0, 3)
    return out


def probe_path(path: str, *, domain: str | None = None, coil_axis: int | None = None,
               dataset: str | None = None, traces: Mapping[str, Any] | None = None,
               workers: int = 1, progress: ProgressFn | None = None,
               **kwargs: Any) -> dict[str, Any]:
    """Read a dataset, measure its support (unless ``traces`` are given), run the probe.

    The first group of a folder or archive is probed (its name is in ``group``);
    ``seconds`` includes the support measurement.
    """
    from app.crop import traces_of_volume
    from app.io import open_input

    t0 = time.perf_counter()
    with open_input(path, domain=domain, coil_axis=coil_axis, dataset=dataset) as loaded:
        if not loaded.volumes:
            raise InputError("empty", "no images found", path)
        vol = loaded.volumes[0]
        if progress is not None:
            progress(0.0, "measuring the k-space support")
        tr = traces if traces is not None else traces_of_volume(vol, workers=workers)
        out = probe_volume(vol, tr, workers=workers, progress=progress, **kwargs)
        out["group"] = vol.name
    out["seconds"] = round(time.perf_counter() - t0, 3)
    return out
