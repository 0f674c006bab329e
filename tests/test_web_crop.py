"""The support-cropped k-space export through the web app (in process, FastAPI's
TestClient; the analysis runs inline through app.worker.run_inline)."""

from __future__ import annotations

import io
import json
import zipfile

import numpy as np
import pytest

from tests.server_harness import inprocess_server, zero_filled_npy


@pytest.fixture(scope="module")
def server(tmp_path_factory):
    with inprocess_server(tmp_path_factory.mktemp("crop")) as srv:
        srv.add_users({"uma": "uma-password-1"})
        yield srv


def test_crop_download_from_page_and_api(server) -> None:
    """Truth (tests/server_harness.zero_filled_npy): 32 x 32 acquisitions zero-filled 2x
    to 64 x 64, root-sum-of-squares of 4 coils, 2 slices. The page links the export; the
    zip holds the k-space (about 32 x 32 per slice, within 4 samples: the analyser's
    precision on a magnitude image this small) and a rawproof.crop/1 sidecar that names
    the magnitude step a crop cannot undo; the API gives the same bytes in HDF5 too."""
    from app.worker import run_inline

    uma = server.login("uma", "uma-password-1")
    ds = uma.upload_files("Crop set", [("scan.npy", zero_filled_npy(41))])["dataset_id"]
    assert uma.get(f"/datasets/{ds}/crop.npz").status_code == 404  # no report yet
    assert run_inline(server.settings) == 1
    page = uma.get(f"/datasets/{ds}").text
    assert f'href="/datasets/{ds}/crop.npz"' in page
    r = uma.get(f"/datasets/{ds}/crop.npz")
    assert r.status_code == 200 and r.headers["content-type"] == "application/zip"
    with zipfile.ZipFile(io.BytesIO(r.content)) as zf:
        side = json.loads(zf.read(f"rawproof-crop-{ds}.json"))
        k = np.load(io.BytesIO(zf.read(f"rawproof-crop-{ds}.npz")))["kspace"]
    assert side["schema"] == "rawproof.crop/1" and side["input_shape"] == [64, 64]
    assert k.shape == (2, *side["shape"]) and all(abs(n - 32) <= 4 for n in side["shape"])
    assert any(s.startswith("magnitude") for s in side["cannot_undo"])
    api = uma.get(f"/api/datasets/{ds}/crop.h5")
    assert api.status_code == 200
    with zipfile.ZipFile(io.BytesIO(api.content)) as zf:
        assert sorted(zf.namelist()) == [f"rawproof-crop-{ds}.h5", f"rawproof-crop-{ds}.json"]
    assert uma.get(f"/datasets/{ds}/crop.tiff").status_code == 404
