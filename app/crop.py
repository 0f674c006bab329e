"""The support-cropped k-space: the route closest to what was acquired.

When a dataset was interpolated by zero-filling, only a centred box of the FFT of
its images holds acquired data (the true support, measured per axis by the
``zero_filling`` analyser); with partial Fourier, only one side of an axis was
acquired (measured by ``partial_fourier`` on complex data). Cropping the centred,
orthonormal 2D FFT of each frame to that box gives k-space on the grid that was
acquired, with the acquired sampling density: the right input for a retrospective
undersampling experiment. A crop cannot undo a nonlinear or lossy step: phase
discarded by a magnitude or root-sum-of-squares image, quantisation, compression
stay in the cropped k-space, and the sidecar says which of them the report found.

Conventions: the FFT is ``scipy.fft`` with ``norm="ortho"``, centred by
``ifftshift`` before and ``fftshift`` after, so the DC sample sits at index
``n // 2`` (:func:`app.sampling.central_slice` places a centred block of width
``w`` at ``n // 2 - w // 2``, the layout of centred zero-filling). Cropping
the k-space of a complex image zero-filled by an integer factor gives back the
acquired k-space unchanged: orthonormal FFTs keep the values of k-space samples
whatever the grid, so no gain is applied, and the inverse FFT of the crop on its
own grid gives the images at the acquired matrix.

The export (:func:`export`) writes ``NAME.npz`` (array ``kspace``) or ``NAME.h5``
(dataset ``kspace``, attribute ``coil_axis`` where coils are kept), shape
``(frames, [coils,] rows, cols)``, and a JSON sidecar ``NAME.json`` of schema
``rawproof.crop/1`` that rawproof reads back (``domain`` and ``coil_axis`` keys) and
that records the crop (``input_shape``, ``shape``, per-axis ``support`` with the
fraction, start and stop, ``partial_fourier`` with the acquired fraction and side),
``cannot_undo`` (what the report found that a crop leaves in place) and
``sampling`` (the effective-acceleration table of ``rawproof sampling`` for the
crop's grid, whose support is the whole grid).

References
----------
.. [1] Bernstein, M. A., Fain, S. B. and Riederer, S. J. "Effect of windowing and
   zero-filled reconstruction of MRI data on spatial resolution and acquisition
   strategy", J. Magn. Reson. Imaging 14(3):270-280, 2001.
.. [2] Shimron, E., Tamir, J. I., Wang, K. and Lustig, M. "Implicit data crimes:
   machine learning bias arising from misuse of public data", Proc. Natl. Acad.
   Sci. USA 119(13):e2117203119, 2022.
"""

from __future__ import annotations

import json
from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import scipy.fft as sfft

import app
from app import sampling
from app.errors import InputError

SCHEMA = "rawproof.crop/1"
AXES = ("rows", "cols")
#: what each trace, when ``present``, leaves in the cropped k-space
_CANNOT_UNDO = {
    "magnitude_only": "magnitude: the phase was discarded; the cropped k-space is the "
                      "spectrum of a real, non-negative image (Hermitian-symmetric), not "
                      "measured k-space",
    "coil_combination": "coil combination: the receive channels were combined "
                        "(root-sum-of-squares or similar); the channels and their noise "
                        "cannot be recovered",
    "intensity_quantization": "quantisation: grey levels were rounded or clipped; the "
                              "rounding error is spread over all of k-space",
    "lossy_compression": "lossy compression: block-transform (JPEG) errors stay in the "
                         "pixels and so in every k-space sample",
    "background_masking": "background masking: the background was replaced by a constant; "
                          "the noise there is gone",
    "resampling": "resampling: the grid was interpolated; its frequency response stays "
                  "inside the support",
    "kspace_filtering": "k-space filtering: the apodization window stays on the samples",
    "kspace_synthesis": "k-space synthesis: samples computed by a reconstruction stay "
                        "computed",
}


@dataclass(frozen=True)
class AxisCrop:
    """The crop along one in-plane axis.

    Attributes
    ----------
    size : int
        Samples along the axis of the delivered grid.
    support_fraction : float
        The measured zero-fill support (1.0: none measured).
    start, stop : int
        The kept index range of centred k-space, ``[start, stop)``.
    partial_fourier_fraction : float
        The measured acquired fraction (1.0: both sides acquired or not measurable).
    side : str or None
        ``"low"`` (indices below DC acquired in full), ``"high"`` or None (both sides
        kept: no partial Fourier found, or a magnitude image whose power spectrum
        is symmetric, so the acquired side cannot be told).
    dc_index : int
        Index of the DC sample inside the crop.
    """

    size: int
    support_fraction: float
    start: int
    stop: int
    partial_fourier_fraction: float
    side: str | None
    dc_index: int

    @property
    def width(self) -> int:
        return self.stop - self.start


@dataclass(frozen=True)
class CropSpec:
    """The support crop of a delivered grid: one :class:`AxisCrop` per in-plane axis."""

    rows: AxisCrop
    cols: AxisCrop
    partial_fourier_note: str | None = None

    @property
    def input_shape(self) -> tuple[int, int]:
        return self.rows.size, self.cols.size

    @property
    def shape(self) -> tuple[int, int]:
        return self.rows.width, self.cols.width

    @property
    def is_identity(self) -> bool:
        return self.shape == self.input_shape

    def to_dict(self) -> dict[str, Any]:
        """The crop as the sidecar's ``support`` and ``partial_fourier`` entries."""
        out: dict[str, Any] = {"input_shape": list(self.input_shape), "shape": list(self.shape),
                               "support": {}, "partial_fourier": {}}
        for ax in AXES:
            a: AxisCrop = getattr(self, ax)
            out["support"][ax] = {"fraction": a.support_fraction, "start": a.start,
                                  "stop": a.stop, "dc_index": a.dc_index}
            out["partial_fourier"][ax] = {"fraction": a.partial_fourier_fraction,
                                          "side": a.side}
        out["partial_fourier"]["note"] = self.partial_fourier_note
        return out


def _fraction(entry: Any, key: str) -> float:
    f = entry.get(key) if isinstance(entry, Mapping) else None
    return float(f) if isinstance(f, int | float) and 0 < f <= 1 else 1.0


def crop_spec(
    shape: tuple[int, int],
    traces: Mapping[str, Any] | None,
) -> CropSpec:
    """The support crop of a ``(rows, cols)`` grid from a report's traces.

    Parameters
    ----------
    shape : (rows, cols)
        The delivered grid.
    traces : mapping
        Contract-shaped traces (``report["traces"]``, or ``Trace.to_dict()`` values):
        ``zero_filling``'s ``estimates.<axis>.support_fraction`` gives the centred
        box (width ``round(f * n)``, placed by :func:`app.sampling.central_slice`);
        ``partial_fourier`` when ``present`` with ``evidence.method.<axis>`` equal
        to ``asymmetric_support`` (complex data) gives the acquired side,
        ``evidence.edges.<axis>`` its first and last index, and the box is cut to it.

    Returns
    -------
    CropSpec

    References
    ----------
    .. [1] Bernstein, Fain and Riederer, J. Magn. Reson. Imaging 14:270-280, 2001.
    """
    traces = traces or {}
    zf = (traces.get("zero_filling") or {}).get("estimates") or {}
    pf = traces.get("partial_fourier") or {}
    pf_present = pf.get("status") == "present"
    pf_est = pf.get("estimates") or {}
    pf_ev = pf.get("evidence") or {}
    note = None
    axes = {}
    for i, ax in enumerate(AXES):
        n = int(shape[i])
        frac = _fraction(zf.get(ax), "support_fraction")
        width = n if frac >= 1.0 else max(2, min(n, int(round(frac * n))))
        box = sampling.central_slice(n, width)
        start, stop = box.start, box.stop
        pf_frac = _fraction(pf_est.get(ax), "fraction") if pf_present else 1.0
        side = None
        method = (pf_ev.get("method") or {}).get(ax) if isinstance(pf_ev.get("method"),
                                                                  Mapping) else None
        edges = (pf_ev.get("edges") or {}).get(ax) if isinstance(pf_ev.get("edges"),
                                                                 Mapping) else None
        if pf_frac < 1.0 and method == "asymmetric_support" and isinstance(edges, list) \
                and len(edges) == 2:
            lo, hi = int(edges[0]), int(edges[1])
            c = n // 2
            side = "low" if (c - lo) > (hi - c) else "high"
            start, stop = max(start, lo), min(stop, hi + 1)
        elif pf_frac < 1.0:
            note = ("partial Fourier was seen in a magnitude image, whose power spectrum is "
                    "symmetric: the acquired side cannot be told, so both sides are kept")
        if stop - start < 2:
            raise InputError("bad_crop", f"the measured support leaves fewer than 2 samples "
                             f"on {ax}")
        axes[ax] = AxisCrop(n, round(frac, 4), int(start), int(stop), round(pf_frac, 4),
                            side, int(n // 2 - start))
    return CropSpec(axes["rows"], axes["cols"], note)


def fft2c(images: np.ndarray, *, workers: int = 1) -> np.ndarray:
    """Centred orthonormal 2D FFT over the last two axes (DC at ``n // 2``)."""
    return sfft.fftshift(sfft.fft2(sfft.ifftshift(images, axes=(-2, -1)), norm="ortho",
                                   workers=workers), axes=(-2, -1))


def ifft2c(kspace: np.ndarray, *, workers: int = 1) -> np.ndarray:
    """Centred orthonormal inverse 2D FFT over the last two axes."""
    return sfft.fftshift(sfft.ifft2(sfft.ifftshift(kspace, axes=(-2, -1)), norm="ortho",
                                    workers=workers), axes=(-2, -1))


def crop_kspace(kspace: np.ndarray, spec: CropSpec) -> np.ndarray:
    """Cut centred k-space ``(..., rows, cols)`` to the crop (values unchanged).

    With orthonormal FFTs a complex image zero-filled by 2 x 2 gives back its
    acquired k-space exactly, to rounding.
    """
    k = np.asarray(kspace)
    if tuple(k.shape[-2:]) != spec.input_shape:
        raise InputError("bad_crop", f"k-space of shape {k.shape[-2:]} does not match the "
                         f"crop's grid {spec.input_shape}")
    return k[..., spec.rows.start:spec.rows.stop, spec.cols.start:spec.cols.stop]


def cannot_undo(traces: Mapping[str, Any] | None) -> list[str]:
    """What the report found that a support crop leaves in the k-space, one line each."""
    traces = traces or {}
    return [text for tid, text in _CANNOT_UNDO.items()
            if (traces.get(tid) or {}).get("status") == "present"]


def sampling_table(spec: CropSpec, acceleration: float = 4.0, *, n_masks: int = 8,
                   seed: int = 0) -> list[dict[str, Any]]:
    """The effective-acceleration table of ``rawproof sampling`` on the crop's grid.

    On the cropped grid the support is the whole grid, so the effective acceleration
    equals the nominal one up to the mask's own rounding; the table says so with
    numbers, one row per mask family (phase-encode lines along ``cols``).
    """
    rows = []
    for fam in sampling.FAMILIES:
        try:
            r = sampling.effective_rate(spec.shape, (1.0, 1.0), fam, acceleration, dims=1,
                                        axis="cols", n_masks=n_masks, seed=seed)
        except InputError as exc:
            rows.append({"family": fam, "error": exc.message})
            continue
        rows.append({k: r[k] for k in ("family", "dims", "axis", "acceleration", "nominal_rate",
                                       "support_rate", "effective_acceleration",
                                       "effective_acceleration_std", "n_masks", "seed")})
    return rows


def sidecar(spec: CropSpec, traces: Mapping[str, Any] | None, *, source: str,
            domain_in: str, coil_axis: int | None, acceleration: float = 4.0,
            frames: int | None = None) -> dict[str, Any]:
    """The JSON sidecar of an export (schema ``rawproof.crop/1``, module docstring)."""
    out = {
        "schema": SCHEMA,
        "domain": "kspace",
        "coil_axis": coil_axis,
        "source": source,
        "source_domain": domain_in,
        "frames": frames,
        "fft": "centred orthonormal 2D FFT of each frame (scipy.fft, norm='ortho', DC at n // 2)",
        **spec.to_dict(),
        "cannot_undo": cannot_undo(traces),
        "sampling": sampling_table(spec, acceleration),
        "caution": app.CAUTION,
    }
    if out["coil_axis"] is None:
        del out["coil_axis"]
    return out


def cropped_frames(volume: Any, spec: CropSpec, *, batch: int = 8, workers: int = 1,
                   indices: Any = None) -> np.ndarray:
    """The support-cropped k-space of a Volume's frames, ``(frames, [coils,] r, c)``.

    Image-domain frames are transformed by :func:`fft2c`; k-space frames are taken
    as they are (centred, DC at ``n // 2``).
    """
    parts = []
    for _, block in volume.iter_slices(batch, indices=indices):
        k = block if volume.domain == "kspace" else fft2c(block.astype(np.complex64),
                                                          workers=workers)
        parts.append(crop_kspace(k.astype(np.complex64, copy=False), spec))
    if not parts:
        raise InputError("empty", "the dataset has no frames to crop")
    return np.concatenate(parts, axis=0)


def write(kspace: np.ndarray, meta: dict[str, Any], out: str | Path, *,
          fmt: str | None = None) -> list[Path]:
    """Write cropped k-space and its sidecar; the paths written.

    Parameters
    ----------
    kspace : ndarray
    meta : dict
        The sidecar (:func:`sidecar`).
    out : path
        ``NAME.npz`` or ``NAME.h5`` / ``NAME.hdf5``; without a suffix, ``fmt`` decides.
    fmt : {"npz", "hdf5"}, optional
    """
    p = Path(out)
    suffix = p.suffix.lower()
    if fmt is None:
        fmt = {".npz": "npz", ".h5": "hdf5", ".hdf5": "hdf5"}.get(suffix)
    if fmt not in ("npz", "hdf5"):
        raise InputError("bad_option", "the export is .npz or .h5 (give -o NAME.npz or NAME.h5)")
    if suffix not in (".npz", ".h5", ".hdf5"):
        p = p.with_suffix(".npz" if fmt == "npz" else ".h5")
    p.parent.mkdir(parents=True, exist_ok=True)
    if fmt == "npz":
        np.savez_compressed(p, kspace=kspace)
    else:
        import h5py

        with h5py.File(p, "w") as fh:
            ds = fh.create_dataset("kspace", data=kspace, compression="gzip", compression_opts=4)
            if meta.get("coil_axis") is not None:
                ds.attrs["coil_axis"] = int(meta["coil_axis"])
            ds.attrs["rawproof_crop"] = json.dumps({k: meta[k] for k in
                                                    ("schema", "input_shape", "shape")})
    side = p.with_suffix(".json")
    side.write_text(json.dumps(meta, indent=2) + "\n", encoding="utf-8")
    return [p, side]


def traces_of_volume(volume: Any, *, workers: int = 1, max_frames: int | None = 64
                     ) -> dict[str, Any]:
    """The traces a crop rests on, measured on a Volume (contract-shaped dicts)."""
    from app.traces import plan

    only = ["zero_filling", "partial_fourier", "magnitude_only", "coil_combination",
            "intensity_quantization", "lossy_compression"]
    result = plan.execute(volume, only=only, workers=workers, max_frames=max_frames)
    return {tid: t.to_dict() for tid, t in result.traces.items()}


def export_path(path: str, out: str | Path, *, fmt: str | None = None,
                domain: str | None = None, coil_axis: int | None = None,
                dataset: str | None = None, workers: int = 1,
                traces: Mapping[str, Any] | None = None) -> dict[str, Any]:
    """Read a dataset, measure its support (or take ``traces``), write the crop.

    The first group of a folder or archive is exported (its name is in the sidecar).

    Returns
    -------
    dict
        The sidecar, with ``files`` (the paths written).
    """
    from app.io import open_input

    with open_input(path, domain=domain, coil_axis=coil_axis, dataset=dataset) as loaded:
        if not loaded.volumes:
            raise InputError("empty", "no images found", path)
        vol = loaded.volumes[0]
        tr = traces if traces is not None else traces_of_volume(vol, workers=workers)
        spec = crop_spec(vol.image_shape, tr)
        k = cropped_frames(vol, spec, workers=workers)
        cax = 1 if vol.coil_axis is not None else None
        meta = sidecar(spec, tr, source=str(path), domain_in=vol.domain, coil_axis=cax,
                       frames=int(k.shape[0]))
        meta["group"] = vol.name
        files = write(k, meta, out, fmt=fmt)
    return {**meta, "files": [str(f) for f in files]}


__all__ = ["AxisCrop", "CropSpec", "crop_spec", "crop_kspace", "cannot_undo", "fft2c",
           "ifft2c", "sampling_table", "sidecar", "cropped_frames", "write", "export_path",
           "traces_of_volume"]
