"""JPEG compression history from pixels alone: the steps, in the order they are chained.

The analysis lives in four modules; this one names them in the order that
:mod:`app.traces.jpeg_pixels` chains them, and re-exports their public names:

1. :mod:`app.traces.grey_lattice` -- :func:`find_lattice` undoes an affine intensity
   map (``v = a * k + b``), so that a JPEG decoded to 8 or 12 bits and rescaled to
   16 bits is measured in its own integer grey levels ``k``;
2. :mod:`app.traces.dct_grid` -- :func:`blocking_signature` measures the blocking
   artefact per phase offset along each axis, :func:`find_block_origin` locates the
   8 x 8 grid (the data may have been cropped after compression) and
   :func:`analyse_grid` runs the whole grid analysis;
3. :mod:`app.traces.dct_quantiser` -- :func:`estimate_steps` estimates the
   quantisation step of each of the 64 DCT frequencies from the periodicity of its
   coefficient histogram;
4. :mod:`app.traces.jp2_wavelet` -- where no 8 x 8 grid is found,
   :func:`wavelet_deadzone` looks for the deadzone a JPEG 2000 quantiser leaves in
   the 9/7 wavelet subbands (:func:`dwt97_2d`).

References
----------
Z. Fan and R. L. de Queiroz, "Identification of bitmap compression history: JPEG
detection and quantizer estimation", IEEE Trans. Image Processing 12(2):230-235,
2003.
ITU-T Recommendation T.81 (1992) | ISO/IEC 10918-1, A.3.3 (the 8 x 8 forward DCT).
ITU-T Recommendation T.800 | ISO/IEC 15444-1, Annexes E and F (JPEG 2000 deadzone
quantisation and the 9/7 wavelet transform).
"""

from __future__ import annotations

from app.traces.dct_grid import (
    GridEstimate,
    analyse_grid,
    block_dct,
    blocking_signature,
    central_region,
    find_block_origin,
    usable_blocks,
)
from app.traces.dct_quantiser import estimate_steps
from app.traces.grey_lattice import Lattice, find_lattice, lattice_levels
from app.traces.jp2_wavelet import DeadzoneEvidence, dwt97_2d, wavelet_deadzone

# the one-level lifting step, for the vanishing-moment test of the 9/7 constants
from app.traces.jp2_wavelet import _lift97 as _lift97

__all__ = [
    "DeadzoneEvidence",
    "GridEstimate",
    "Lattice",
    "analyse_grid",
    "block_dct",
    "blocking_signature",
    "central_region",
    "dwt97_2d",
    "estimate_steps",
    "find_block_origin",
    "find_lattice",
    "lattice_levels",
    "usable_blocks",
    "wavelet_deadzone",
]
