"""The Volume: what every reader returns and every analyser reads."""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass, field
from typing import Any

import numpy as np

DOMAINS = ("image", "kspace")


@dataclass
class Header:
    """Provenance fields normalised from a file header, plus a raw summary.

    Attributes
    ----------
    fields : dict
        Normalised provenance fields a reader found. Known keys (all optional):
        ``image_type`` (list of str), ``lossy_compression`` (bool|None),
        ``lossy_ratio`` (float), ``lossy_method`` (str), ``transfer_syntax`` (UID str),
        ``transfer_syntax_name`` (str), ``acquisition_matrix`` (list of 4 int),
        ``rows``, ``columns`` (int), ``phase_encoding_direction`` ("ROW"|"COL"),
        ``percent_phase_fov`` (float), ``percent_sampling`` (float),
        ``derivation_description`` (str), ``bits_stored``, ``bits_allocated`` (int),
        ``pixel_representation`` (int), ``modality`` (str), ``manufacturer`` (str),
        ``sform_code``, ``qform_code`` (int), ``descrip`` (str), ``nifti_version`` (int),
        ``jpeg_quant_tables`` (list of 64-entry lists in natural row-major order),
        ``bit_depth`` (int, for PNG/TIFF/JPEG), ``rescale_slope``, ``rescale_intercept``.
        Also written by the readers: ``pixel_spacing`` (``[row, col]`` mm),
        ``stored_value_range`` (``[min, max]`` of the stored values, DICOM),
        ``samples_per_pixel``, ``photometric_interpretation``, ``jpeg_process`` and
        ``jpeg_precision`` (from the JPEG frame header), ``jpeg_quant_tables_vary``
        (bool, image stacks), ``frames_reordered`` (bool), ``n_files`` (int),
        ``image_mode`` (Pillow mode), ``tiff_compression``, ``datatype``,
        ``intent_code``, ``aux_file`` (NIfTI), ``array_key`` (npz), ``dataset`` and
        ``coil_axis_in_file`` (HDF5).
        ISMRMRD headers (app/io/ismrmrd.py): ``ismrmrd_encoded_matrix``,
        ``ismrmrd_recon_matrix`` (``[x, y, z]``), ``ismrmrd_encoded_fov_mm``,
        ``ismrmrd_recon_fov_mm``, ``ismrmrd_step1_limits``, ``ismrmrd_step2_limits``
        (``{"minimum", "maximum", "center"}``), ``readout_oversampling`` (float),
        ``partial_fourier_fraction`` (acquired share along encoding step 1),
        ``padded_lines`` (int), ``parallel_acceleration`` (float), ``trajectory``,
        ``receiver_channels``, ``field_strength_t``, ``ismrmrd_header`` (bool: an
        XML header beside an HDF5 ``kspace`` array), ``acquisitions``,
        ``acquired_lines``, ``noise_acquisitions`` (int) and
        ``noise_variance_per_channel`` (list, from noise-measurement acquisitions).
    raw : dict
        A JSON-serialisable summary of the raw header (tag keyword -> str value).
    """

    fields: dict[str, Any] = field(default_factory=dict)
    raw: dict[str, Any] = field(default_factory=dict)


@dataclass
class Volume:
    """A candidate dataset group, read from one or more files.

    Attributes
    ----------
    data : array-like
        numpy array (possibly memory-mapped) or a lazily sliced array (h5py dataset)
        with shape ``(..., rows, cols)``. Values are the *stored* values; ``scale``
        and ``offset`` are applied by :meth:`iter_slices` (so memory stays bounded).
    domain : {"image", "kspace"}
    axes : tuple of str
        One name per axis of ``data``; the last two are always ``"rows"``, ``"cols"``.
        Others: ``"slices"``, ``"time"``, ``"coils"``, ``"frames"``, ``"channels"``.
    spacing : tuple of float or None
        Voxel spacing per axis of ``data`` in millimetres where known, else None.
    source_files : list of str
    format : str
        One of the report contract's formats: dicom, nifti, npy, npz, hdf5, png, jpeg, tiff.
    header : Header
    scale, offset : float
        Affine map from stored to physical values (DICOM RescaleSlope/Intercept,
        NIfTI scl_slope/scl_inter). ``1.0`` and ``0.0`` when none.
    name : str
        A label for the group (series description, file stem).
    affine : ndarray or None
        4 x 4 voxel-to-world matrix where the format has one.
    """

    data: Any
    domain: str = "image"
    axes: tuple[str, ...] = ("rows", "cols")
    spacing: tuple[float, ...] | None = None
    source_files: list[str] = field(default_factory=list)
    format: str = "npy"
    header: Header = field(default_factory=Header)
    scale: float = 1.0
    offset: float = 0.0
    name: str = ""
    affine: Any = None

    def __post_init__(self) -> None:
        if self.domain not in DOMAINS:
            raise ValueError(f"domain must be one of {DOMAINS}, not {self.domain!r}")
        if len(self.axes) != len(self.data.shape):
            raise ValueError(f"axes {self.axes} do not match data shape {self.data.shape}")
        if tuple(self.axes[-2:]) != ("rows", "cols"):
            raise ValueError("the last two axes must be rows and cols")

    @classmethod
    def from_array(
        cls,
        array: Any,
        *,
        domain: str = "image",
        coil_axis: int | None = None,
        **kwargs: Any,
    ) -> Volume:
        """Wrap an array; axes are ``slices`` (and ``coils``) before ``rows, cols``.

        Parameters
        ----------
        array : array-like
            2D or more.
        domain : {"image", "kspace"}
        coil_axis : int, optional
            Axis that indexes receive channels; it is kept where it is and named
            ``"coils"``.
        """
        a = array if hasattr(array, "shape") else np.asarray(array)
        if len(a.shape) < 2:
            raise ValueError("an image needs at least two dimensions")
        nd = len(a.shape)
        axes = ["slices"] * (nd - 2) + ["rows", "cols"]
        if nd == 4:
            axes[0] = "time"
        if coil_axis is not None:
            ax = coil_axis % nd
            if ax >= nd - 2:
                raise ValueError("the coil axis cannot be one of the last two (image) axes")
            axes[ax] = "coils"
        return cls(data=a, domain=domain, axes=tuple(axes), **kwargs)

    # ----- shape helpers -------------------------------------------------
    @property
    def shape(self) -> tuple[int, ...]:
        return tuple(int(s) for s in self.data.shape)

    @property
    def dtype(self) -> np.dtype:
        return np.dtype(self.data.dtype)

    @property
    def value_type(self) -> str:
        return "complex" if np.issubdtype(self.dtype, np.complexfloating) else "real"

    @property
    def coil_axis(self) -> int | None:
        return self.axes.index("coils") if "coils" in self.axes else None

    @property
    def n_coils(self) -> int:
        ax = self.coil_axis
        return 1 if ax is None else self.shape[ax]

    @property
    def image_shape(self) -> tuple[int, int]:
        return self.shape[-2], self.shape[-1]

    @property
    def n_slices(self) -> int:
        """Number of 2D images (all non-image, non-coil axes flattened)."""
        n = 1
        for name, size in zip(self.axes[:-2], self.shape[:-2], strict=True):
            if name != "coils":
                n *= size
        return n

    @property
    def slice_axis_size(self) -> int | None:
        """Size of the ``slices`` axis (the through-plane axis), if any."""
        return self.shape[self.axes.index("slices")] if "slices" in self.axes else None

    @property
    def nbytes(self) -> int:
        n = self.dtype.itemsize
        for s in self.shape:
            n *= s
        return n

    # ----- data access ---------------------------------------------------
    def _canonical(self) -> Any:
        """The data with coils moved just before rows, cols and frames flattened first.

        Returns a view where possible (memory-mapped arrays stay on disk).
        """
        a = self.data
        ax = self.coil_axis
        if ax is not None and ax != len(self.shape) - 3:
            a = np.moveaxis(a, ax, -3) if isinstance(a, np.ndarray) else a
        return a

    def iter_slices(
        self,
        batch: int = 16,
        *,
        scaled: bool = True,
        dtype: Any = None,
        indices: Any = None,
    ) -> Iterator[tuple[np.ndarray, np.ndarray]]:
        """Yield ``(frame_indices, block)`` batches of 2D images.

        Parameters
        ----------
        batch : int
            Frames per batch.
        scaled : bool
            Apply ``scale`` and ``offset`` (physical values). With ``False`` the
            stored values are returned unchanged in their stored dtype.
        dtype : numpy dtype, optional
            Output dtype when scaled; default float32 (complex64 for complex data).
        indices : sequence of int, optional
            Only these flat frame indices (for stated subsampling).

        Yields
        ------
        frame_indices : ndarray of int
        block : ndarray
            Shape ``(b, rows, cols)``, or ``(b, coils, rows, cols)`` for multi-coil data.
        """
        rows, cols = self.image_shape
        a = self._canonical()
        multi = self.coil_axis is not None
        lead = self.shape[:-2]
        n_frames = self.n_slices
        if indices is None:
            indices = np.arange(n_frames)
        indices = np.asarray(indices, dtype=int)
        if dtype is None:
            dtype = np.complex64 if self.value_type == "complex" else np.float32
        frame_shape = tuple(s for s, n in zip(lead, self.axes[:-2], strict=True) if n != "coils")
        for start in range(0, len(indices), batch):
            idx = indices[start : start + batch]
            contiguous = len(idx) > 0 and bool(np.all(np.diff(idx) == 1))
            if len(frame_shape) == 0:
                block = np.asarray(a)[None]
                idx = idx[:1]
            elif len(frame_shape) == 1 and contiguous:
                block = np.asarray(a[int(idx[0]) : int(idx[-1]) + 1])
            else:
                block = None
            if block is not None:
                yield idx, self._finish(block, scaled, dtype)
                continue
            parts = []
            for flat in idx:
                pos = np.unravel_index(int(flat), frame_shape) if frame_shape else ()
                if multi:
                    sel = tuple(int(p) for p in pos) + (slice(None), slice(None), slice(None))
                else:
                    sel = tuple(int(p) for p in pos) + (slice(None), slice(None))
                parts.append(np.asarray(a[sel]))
            block = np.stack(parts) if parts else np.empty((0, rows, cols))
            yield idx, self._finish(block, scaled, dtype)

    def _finish(self, block: np.ndarray, scaled: bool, dtype: Any) -> np.ndarray:
        if not scaled:
            return block
        block = block.astype(dtype, copy=False)
        if self.scale != 1.0:
            block = block * np.asarray(self.scale, dtype=block.real.dtype)
        if self.offset != 0.0:
            block = block + np.asarray(self.offset, dtype=block.real.dtype)
        return block

    def frame(self, index: int, *, scaled: bool = True) -> np.ndarray:
        """One 2D image (or coils x rows x cols) by flat frame index."""
        for _, block in self.iter_slices(1, scaled=scaled, indices=[index]):
            return block[0]
        raise IndexError(index)

    def to_array(self, *, scaled: bool = True) -> np.ndarray:
        """All frames as one array ``(frames, [coils,] rows, cols)``; for small data."""
        blocks = [b for _, b in self.iter_slices(64, scaled=scaled)]
        return np.concatenate(blocks, axis=0)
