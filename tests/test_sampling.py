"""Tests of the effective sampling rate (app/sampling.py) and ``rawproof sampling``.

Outside references:
- Facts of the trade (common practice, no source): a uniform random mask samples
  the true support at its nominal rate at any padding; a mask keeping 17 % of the
  samples has an acceleration of about 6; variable-density masks sample the central
  support more densely the more the data were zero-padded.
- sigpy's ``sigpy.mri.poisson`` (a second, independent source of Poisson-disc
  masks): the rates computed for them must agree with a direct count.
- The direct count: samples kept inside the centred support box, counted here with
  plain slicing (the zero-fill convention of demo_data/synth.zero_fill).
"""

from __future__ import annotations

import json

import numpy as np
import pytest

from app import sampling
from app.cli import main
from app.errors import InputError


def _direct_support_rate(mask: np.ndarray, support: tuple[float, float]) -> float:
    """Kept samples inside the centred box, by plain slicing (independent of the module)."""
    rows, cols = mask.shape
    wr, wc = int(round(support[0] * rows)), int(round(support[1] * cols))
    r0, c0 = rows // 2 - wr // 2, cols // 2 - wc // 2
    box = mask[r0:r0 + wr, c0:c0 + wc]
    return float(box.sum()) / box.size


@pytest.mark.parametrize("dims", [1, 2])
@pytest.mark.parametrize("support", [(1.0, 1.0), (0.5, 0.5), (0.25, 0.4)])
def test_uniform_mask_samples_the_support_at_the_nominal_rate(dims, support):
    """Uniform random: support rate = nominal rate at any padding (common practice, no source).

    Tolerance: 4 standard errors of the mean over the masks.
    """
    r = sampling.effective_rate((128, 128), support, "uniform", 4, dims=dims, n_masks=60,
                                seed=3)
    se = r["support_rate_std"] / np.sqrt(r["n_masks"])
    assert abs(r["nominal_rate"] - 0.25) < 1e-9
    assert abs(r["support_rate"] - r["nominal_rate"]) <= 4 * se + 1e-3


def test_seventeen_percent_is_about_six_fold():
    """A mask keeping 17 % of samples is about 6-fold accelerated (common practice, no source)."""
    r = sampling.effective_rate((256, 256), (1, 1), "uniform", 1 / 0.17, dims=2, n_masks=3)
    assert abs(r["nominal_rate"] - 0.17) < 0.001
    assert round(r["effective_acceleration"]) == 6


@pytest.mark.parametrize("family", ["polynomial", "gaussian", "poisson"])
@pytest.mark.parametrize("dims", [1, 2])
def test_variable_density_is_denser_on_smaller_supports(family, dims):
    """More padding -> denser sampling of the true support (common practice, no source)."""
    rates = [
        sampling.effective_rate((128, 128), (f, f), family, 4, dims=dims, n_masks=6,
                                seed=1)["support_rate"]
        for f in (1.0, 1 / 1.5, 0.5, 1 / 3)
    ]
    assert abs(rates[0] - 0.25) < 0.01
    assert all(b > a for a, b in zip(rates, rates[1:], strict=False)), rates


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_sigpy_poisson_masks_agree_with_direct_count(seed):
    """sigpy.mri.poisson masks (second source): rates_of_masks equals the direct count."""
    sigpy_mri = pytest.importorskip("sigpy.mri")
    mask = np.abs(sigpy_mri.poisson((96, 80), 4, calib=(8, 8), seed=seed)) > 0
    support = (0.5, 0.4)
    got = sampling.rates_of_masks([mask], support)
    assert got["support_rate"] == pytest.approx(_direct_support_rate(mask, support), abs=1e-12)
    assert got["nominal_rate"] == pytest.approx(mask.mean(), abs=1e-12)
    # sigpy's masks are variable density too: denser in the central support
    assert got["support_rate"] > got["nominal_rate"]


@pytest.mark.parametrize("family", sampling.FAMILIES)
@pytest.mark.parametrize("dims", [1, 2])
def test_cli_answers_every_family_and_matches_direct_count(family, dims, capsys):
    """`rawproof sampling --json` for each family and dimensionality equals a direct count."""
    shape, support, n_masks, seed = (96, 112), (0.5, 0.5), 4, 7
    rc = main(["sampling", "--shape", *map(str, shape), "--support", *map(str, support),
               "--family", family, "-R", "4", "--dims", str(dims), "--n-masks", str(n_masks),
               "--seed", str(seed), "--json"])
    assert rc == 0
    out = json.loads(capsys.readouterr().out)
    res = out["results"][0]
    masks = sampling.random_masks(shape, family, 4, dims=dims, n_masks=n_masks, seed=seed,
                                  **res["params"])
    direct = np.mean([_direct_support_rate(m, support) for m in masks])
    assert res["support_rate"] == pytest.approx(direct, abs=1e-12)
    assert res["nominal_rate"] == pytest.approx(np.mean([m.mean() for m in masks]), abs=1e-12)
    assert res["effective_acceleration"] == pytest.approx(1 / direct, rel=1e-12)
    # the mask budget is the nominal acceleration (2D lattices to within the lattice step)
    assert abs(1 / res["nominal_rate"] - 4) < (0.4 if family == "equispaced" else 0.05)
    if dims == 1:
        for m in masks:
            assert (m == m[:1]).all()  # whole lines along the rows


def test_cli_reads_support_from_a_report(tmp_path, capsys):
    """--from-report takes the zero-filling support of a real report (truth: 2x padding)."""
    from app.io.volume import Volume
    from app.traces.report import analyse_volume
    from demo_data import synth

    mag, out_shape = synth.zero_filled_magnitude((64, 64), (2.0, 2.0), n_coils=4, n_slices=4)
    report = analyse_volume(Volume.from_array(mag))
    path = tmp_path / "report.json"
    path.write_text(json.dumps(report))
    rc = main(["sampling", "--from-report", str(path), "--family", "gaussian", "-R", "4",
               "--n-masks", "3", "--json"])
    assert rc == 0
    out = json.loads(capsys.readouterr().out)
    assert out["shape"] == list(out_shape)
    assert out["support"] == pytest.approx([0.5, 0.5], abs=0.03)
    assert out["results"][0]["effective_acceleration"] < 3.0


def test_cli_bad_input_is_exit_2(tmp_path, capsys):
    """Bad user input gives exit code 2 and an error object, never a traceback."""
    assert main(["sampling", "--shape", "64", "64", "--family", "spiral", "--json"]) == 2
    assert json.loads(capsys.readouterr().out)["error"]["code"] == "bad_family"
    bad = tmp_path / "x.json"
    bad.write_text("{not json")
    assert main(["sampling", "--from-report", str(bad)]) == 2
    assert main(["sampling"]) == 2
    with pytest.raises(InputError):
        sampling.effective_rate((64, 64), (1.5, 1), "uniform", 4)


def test_curve_against_raw():
    """The curve: on a raw acquisition effective = nominal; on a half support it is lower."""
    c = sampling.curve((128, 128), (0.5, 0.5), "gaussian", [2, 4, 8], dims=2, n_masks=3)
    assert c["raw_effective"] == pytest.approx([2, 4, 8], rel=0.01)
    assert all(e < r for e, r in zip(c["effective"], c["acceleration"], strict=True))


def test_poisson_disc_masks_keep_their_distance():
    """Poisson-disc sampling keeps samples apart (Bridson 2007: no two closer than r).

    Compared with a uniform random mask of the same budget, far fewer kept samples
    have a kept 8-neighbour (truth: uniform random at 25 % gives about 1 - 0.75^8 = 90 %).
    """
    from scipy import ndimage

    ring = np.array([[1, 1, 1], [1, 0, 1], [1, 1, 1]])

    def crowded(mask):
        nb = ndimage.convolve(mask.astype(int), ring, mode="constant")
        return float((nb[mask] > 0).mean())

    pois = sampling.make_mask((128, 128), "poisson", 4, dims=2, seed=1)
    unif = sampling.make_mask((128, 128), "uniform", 4, dims=2, seed=1)
    assert abs(crowded(unif) - (1 - 0.75**8)) < 0.03
    assert crowded(pois) < 0.7 * crowded(unif)
