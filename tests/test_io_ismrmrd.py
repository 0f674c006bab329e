"""ISMRMRD raw files, written with the ``ismrmrd`` package's own API, read back with their header.

The outside reference is the ``ismrmrd`` package (its ``Dataset``,
``Acquisition`` and ``xsd`` header classes) and the ISMRMRD standard's encoding
limits (Inati et al., MRM 77(1):411-421, 2017).
"""

from __future__ import annotations

from pathlib import Path

import h5py
import numpy as np
import pytest

ismrmrd = pytest.importorskip("ismrmrd")

from app.io import open_input  # noqa: E402
from app.io.ismrmrd import header_fields  # noqa: E402


def _header(nx: int, ny: int, *, recon_x: int, lo: int, hi: int, centre: int,
            channels: int) -> str:
    """An ISMRMRD header built with the package's own xsd classes."""
    xsd = ismrmrd.xsd
    enc = xsd.encodingType(
        encodedSpace=xsd.encodingSpaceType(
            matrixSize=xsd.matrixSizeType(x=nx, y=ny, z=1),
            fieldOfView_mm=xsd.fieldOfViewMm(x=440.0, y=220.0, z=5.0)),
        reconSpace=xsd.encodingSpaceType(matrixSize=xsd.matrixSizeType(x=recon_x, y=ny, z=1),
                                         fieldOfView_mm=xsd.fieldOfViewMm(x=220.0, y=220.0, z=5.0)),
        encodingLimits=xsd.encodingLimitsType(
            kspace_encoding_step_1=xsd.limitType(minimum=lo, maximum=hi, center=centre)),
        trajectory=xsd.trajectoryType.CARTESIAN)
    h = xsd.ismrmrdHeader(
        experimentalConditions=xsd.experimentalConditionsType(H1resonanceFrequency_Hz=63500000),
        acquisitionSystemInformation=xsd.acquisitionSystemInformationType(
            systemVendor="invented", receiverChannels=channels),
        encoding=[enc])
    return xsd.ToXML(h)


def _write(path: Path, k: np.ndarray, lines: np.ndarray, xml: str, noise: np.ndarray) -> None:
    ds = ismrmrd.Dataset(str(path), "dataset", create_if_needed=True)
    ds.write_xml_header(xml)
    acq = ismrmrd.Acquisition.from_array(noise.astype(np.complex64))
    acq.set_flag(ismrmrd.ACQ_IS_NOISE_MEASUREMENT)
    ds.append_acquisition(acq)
    for y in lines:
        acq = ismrmrd.Acquisition.from_array(np.ascontiguousarray(k[:, y, :]).astype(
            np.complex64))
        acq.idx.kspace_encode_step_1 = int(y)
        ds.append_acquisition(acq)
    ds.close()


def test_ismrmrd_file_reads_back_with_header(tmp_path: Path) -> None:
    """Acquisitions land on their encoding lines; limits give partial Fourier and oversampling.

    Truth built: 4 channels, 64 encoded lines of which 0..47 are acquired with
    the centre at 32 (partial Fourier: 48 of a symmetric 64, fraction 0.75);
    encoded readout FOV twice the reconstructed one (2x oversampling); one noise
    acquisition of variance 2 per channel (unit-variance real and imaginary
    parts; tolerance 25% for 256 samples). Lines 48..63 are zero (never acquired).
    """
    rng = np.random.default_rng(0)
    c, ny, nx = 4, 64, 128
    k = (rng.standard_normal((c, ny, nx)) + 1j * rng.standard_normal((c, ny, nx)))
    lines = np.arange(0, 48)
    noise = rng.standard_normal((c, 256)) + 1j * rng.standard_normal((c, 256))
    xml = _header(nx, ny, recon_x=nx // 2, lo=0, hi=47, centre=32, channels=c)
    p = tmp_path / "raw.h5"
    _write(p, k, lines, xml, noise)
    with open_input(p) as loaded:
        (v,) = loaded.volumes
        assert v.domain == "kspace" and v.n_coils == c
        arr = v.to_array()
        assert arr.shape == (1, c, ny, nx)
        np.testing.assert_allclose(arr[0][:, lines], k[:, lines].astype(np.complex64),
                                   rtol=1e-6)
        assert not np.any(arr[0][:, 48:])
        f = v.header.fields
        assert f["ismrmrd_encoded_matrix"] == [nx, ny, 1]
        assert f["ismrmrd_recon_matrix"] == [nx // 2, ny, 1]
        assert f["readout_oversampling"] == pytest.approx(2.0)
        assert f["partial_fourier_fraction"] == pytest.approx(0.75)
        assert f["padded_lines"] == 16
        assert f["noise_acquisitions"] == 1
        assert np.allclose(f["noise_variance_per_channel"], 2.0, rtol=0.25)


def test_kspace_with_ismrmrd_header_beside_it(tmp_path: Path) -> None:
    """The public raw-data layout: ``kspace`` array plus an ``ismrmrd_header`` XML string.

    Truth: the header (written by ismrmrd.xsd) declares 40 lines acquired of 48
    encoded, centre 24: fraction 40 / 48 = 0.833 (symmetric extent 2 * 24),
    8 padded lines; the array is read as k-space with its coil axis.
    """
    rng = np.random.default_rng(1)
    k = (rng.standard_normal((2, 3, 48, 64)) + 1j * rng.standard_normal((2, 3, 48, 64)))
    xml = _header(64, 48, recon_x=64, lo=0, hi=39, centre=24, channels=3)
    p = tmp_path / "file1000.h5"
    with h5py.File(p, "w") as f:
        f["kspace"] = k.astype(np.complex64)
        f["kspace"].attrs["coil_axis"] = 1
        f["ismrmrd_header"] = xml
    with open_input(p) as loaded:
        (v,) = loaded.volumes
        assert v.domain == "kspace" and v.n_coils == 3
        f = v.header.fields
        assert f["ismrmrd_header"] is True
        assert f["partial_fourier_fraction"] == pytest.approx(40 / 48, abs=1e-3)
        assert f["padded_lines"] == 8
        assert f["readout_oversampling"] == pytest.approx(2.0)


def test_header_fields_refuse_non_xml() -> None:
    """A header that is not XML raises ValueError (ElementTree's ParseError derives from it)."""
    with pytest.raises(ValueError):
        header_fields("not xml <")
