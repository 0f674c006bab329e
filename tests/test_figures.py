"""Evidence figures (app/web/figures.py): what is drawn matches the evidence.

The evidence dicts are built here from synthetic truths (demo_data/synth.py)
and from outside references: scipy.stats densities (Rayleigh, chi), the
standard luminance table of ITU-T T.81 Annex K scaled as libjpeg does
(app/traces/jpeg_tables.scaled_table, itself checked against Pillow's encoder
in its own tests). Each test inspects the matplotlib artists, so a figure that
draws the wrong edge, table or curve fails; the PNG tests decode the bytes with
Pillow and require a non-blank picture.
"""

from __future__ import annotations

import io

import numpy as np
import pytest
import scipy.stats as st
from matplotlib.patches import Rectangle
from PIL import Image

from app.traces.jpeg_tables import scaled_table
from app.web import figures
from demo_data import synth


def _profile_db(kspace: np.ndarray, axis: int) -> np.ndarray:
    other = tuple(a for a in range(kspace.ndim) if a != axis)
    e = (np.abs(kspace) ** 2).sum(axis=other)
    return 10 * np.log10(e + 1e-30)


@pytest.fixture(scope="module")
def zf_report() -> dict:
    """Truth: 96 x 64 acquired, zero-filled to 96 x 128 (cols support 32..95), one slice."""
    img = synth.acquire((96, 64), n_coils=1, n_slices=1, seed=5)[0, 0]
    k = synth.zero_fill(synth.to_kspace(img), (96, 128))
    prof_r, prof_c = _profile_db(k, 0), _profile_db(k, 1)
    power = 10 * np.log10(np.abs(k) ** 2 + 1e-30)
    step = 2
    pmap = power.reshape(48, 2, 64, 2).mean(axis=(1, 3))
    return {
        "input": {"shape": [1, 96, 128]},
        "traces": {
            "zero_filling": {
                "status": "present", "confidence": 0.9, "summary": "s", "estimates": {},
                "evidence": {
                    "profiles_db": {"rows": prof_r.tolist(), "cols": prof_c.tolist()},
                    "edges": {"rows": None, "cols": [32, 95]},
                    "drop_db": {"rows": None, "cols": 250.0},
                    "noise_floor_db": {"rows": float(np.median(prof_r)), "cols": -300.0},
                    "spectrum_map_db": pmap.tolist(),
                    "spectrum_map_step": [step, step],
                    "spectrum_slice": 0,
                },
            },
        },
    }


def _decode(png: bytes) -> np.ndarray:
    im = Image.open(io.BytesIO(png))
    im.load()
    assert im.format == "PNG"
    return np.asarray(im.convert("L"))


def test_spectrum_map_outlines_truth_support(zf_report: dict) -> None:
    """The outline spans columns 32..95 of 128 (k = -32.5 .. 31.5 from centre) and
    the full 96 rows, because the row axis had no detected edge. Tolerance 1e-9."""
    fig = figures.build_spectrum_map(zf_report)
    ax = fig.axes[0]
    rects = [p for p in ax.patches if isinstance(p, Rectangle)]
    assert rects, "no support outline"
    r = rects[-1]
    assert r.get_x() == pytest.approx(32 - 64 - 0.5)
    assert r.get_width() == pytest.approx(64.0)
    assert r.get_y() == pytest.approx(-48 - 0.5)
    assert r.get_height() == pytest.approx(96.0)
    assert "dB" in fig.axes[1].get_ylabel()
    assert "samples" in ax.get_xlabel() and "samples" in ax.get_ylabel()


def test_profiles_plot_measured_energy_and_edges(zf_report: dict) -> None:
    """The plotted profile is the evidence itself, and the edge lines sit at the
    truth edges (32 and 95, i.e. -32 and +31 from the centre)."""
    fig = figures.build_kspace_profiles(zf_report)
    ax_rows, ax_cols = fig.axes[:2]
    ev = zf_report["traces"]["zero_filling"]["evidence"]
    line = ax_cols.get_lines()[0]
    np.testing.assert_allclose(line.get_ydata(), ev["profiles_db"]["cols"])
    np.testing.assert_allclose(line.get_xdata(), np.arange(128) - 64)
    vlines = sorted(ln.get_xdata()[0] for ln in ax_cols.get_lines()[1:]
                    if len(set(ln.get_xdata())) == 1 and ln.get_linestyle() == "--")
    assert vlines == [-32, 31]
    texts = " ".join(t.get_text() for t in ax_cols.texts)
    assert "250.0 dB" in texts
    assert "dB" in ax_rows.get_ylabel() and "samples" in ax_rows.get_xlabel()


def test_profiles_with_downsampled_profile_scale_to_samples() -> None:
    """A 2048-sample axis whose profile was averaged to 1024 points is drawn on
    the original sample scale (-1024 .. 1022 in steps of 2)."""
    rep = {"input": {"shape": [2048, 2048]}, "traces": {"kspace_filtering": {
        "status": "present", "estimates": {"window": "hann"}, "evidence": {
            "profiles_db": {"cols": list(np.linspace(0, 1, 1024))},
            "fits": {"cols": {"window": "hann", "param": None,
                              "curve_db": list(np.linspace(0, 1, 1024)), "error": 0.1}}}}}}
    fig = figures.build_kspace_profiles(rep)
    x = fig.axes[0].get_lines()[0].get_xdata()
    assert x[0] == -1024 and x[-1] == 1022
    labels = [ln.get_label() for ln in fig.axes[0].get_lines()]
    assert "fitted hann window" in labels


def _profile_report(kf_status: str, pf_status: str, fit_window: str,
                    estimate_window: str | None) -> dict:
    ramp = list(np.linspace(0, 1, 64))
    fits = {"cols": {"window": fit_window, "curve_db": ramp}}
    return {"input": {"shape": [64, 64]}, "traces": {
        "kspace_filtering": {"status": kf_status, "estimates": {"window": estimate_window},
                             "evidence": {"profiles_db": {"cols": ramp}, "fits": fits}},
        "partial_fourier": {"status": pf_status, "estimates": {},
                            "evidence": {"edges": {"cols": [20, 64]}}}}}


def test_profiles_draw_a_fit_and_a_band_only_where_the_trace_found_them() -> None:
    """Issue 22 item 4 (common practice, no source: a figure shows what the finding
    says): a raw dataset (both traces absent) gets neither a fitted window nor a
    partial-Fourier band; a found window is named by the trace's estimate (the
    finding text's field), not by the evidence's best-fitting family."""
    quiet = figures.build_kspace_profiles(_profile_report("absent", "absent", "gaussian", None))
    labels = [ln.get_label() for ln in quiet.axes[0].get_lines()]
    assert not any("fitted" in lb for lb in labels)
    assert not any("partial Fourier" in str(p.get_label()) for p in quiet.axes[0].patches)
    found = figures.build_kspace_profiles(_profile_report("present", "present", "hamming",
                                                          "gaussian"))
    labels = [ln.get_label() for ln in found.axes[0].get_lines()]
    assert "fitted gaussian window" in labels and "fitted hamming window" not in labels
    assert any("partial Fourier" in str(p.get_label()) for p in found.axes[0].patches)


def test_grey_levels_of_float_data_are_not_counted_as_levels() -> None:
    """A float32 image has no 2**32 'possible' levels (IEEE 754 floats are not a
    uniform grid); the title says floating-point storage instead, on two lines when long."""
    ev = {"histogram": {"edges": [0.0, 1.0, 2.0], "counts": [5, 7]}, "distinct_levels": 70000,
          "stated_bits": 32, "comb_score": 0.1}
    rep = {"input": {"dtype": "float32"},
           "traces": {"intensity_quantization": {"status": "absent", "evidence": ev}}}
    title = figures.build_grey_levels(rep).axes[0].get_title()
    assert "4,294,967,296" not in title and "float32 storage (floating point)" in title
    rep["input"]["dtype"] = "uint16"
    ev["stated_bits"] = 12
    assert "12-bit storage (4,096 possible levels)" in figures.build_grey_levels(
        rep).axes[0].get_title()


def test_periodicity_marks_the_peaks_that_were_set_aside() -> None:
    """The resampling trace sets aside 1/8-periodic peaks when the pixels carry a JPEG
    block grid (Fridrich-style blocking, common practice); the figure marks them."""
    line = {"freq": list(np.linspace(0, 0.5, 65)), "power": list(np.ones(65)), "peaks": []}
    rep = {"traces": {"resampling": {"status": "absent", "evidence": {
        "periodicity": {"rows": line, "cols": line}, "block_grid_excluded": True,
        "dyadic_excluded": False, "zero_fill_explained": {"cols": 0.3}}}}}
    fig = figures.build_periodicity(rep)
    rows, cols = fig.axes[0], fig.axes[1]
    xs = sorted(round(float(ln.get_xdata()[0]), 3) for ln in rows.get_lines()[1:])
    assert xs == [0.125, 0.25, 0.375, 0.5]
    labels = [ln.get_label() for ln in cols.get_lines()]
    assert "set aside (JPEG 8 x 8 block grid)" in labels
    assert "set aside (explained by zero-filling)" in labels


def test_folded_window_fit_is_drawn_on_both_sides() -> None:
    """A fit given against distance from DC (``k``, the kspace_filtering analyser's
    folded profile) is drawn mirrored: at -k and +k with the same values."""
    k = np.arange(3, 40, dtype=float)
    curve = 100 - 0.02 * k ** 2
    rep = {"input": {"shape": [96, 96]}, "traces": {"kspace_filtering": {
        "status": "present", "estimates": {"window": "hann"}, "evidence": {
            "profiles_db": {"rows": list(np.zeros(96))},
            "fits": {"rows": {"window": "hann", "param": None, "k": k.tolist(),
                          "curve_db": curve.tolist(), "error": 0.5}}}}}}
    fig = figures.build_kspace_profiles(rep)
    fit = next(ln for ln in fig.axes[0].get_lines() if ln.get_label() == "fitted hann window")
    np.testing.assert_allclose(fit.get_xdata(), np.concatenate([-k[::-1], k]))
    np.testing.assert_allclose(fit.get_ydata(), np.concatenate([curve[::-1], curve]))


def test_background_densities_match_scipy_and_mark_choice() -> None:
    """Truth: magnitude of 8-channel root-sum-of-squares noise, sigma = 1, i.e. a
    central chi law with 8 channels (scipy.stats.chi(df=16, scale=1)) -- the
    chosen law; Rayleigh from scipy.stats.rayleigh. The drawn curves are these
    densities exactly, and the chosen one is drawn thickest with L in its label."""
    rng = np.random.default_rng(0)
    samples = np.sqrt((rng.standard_normal((20000, 16)) ** 2).sum(1))
    counts, edges = np.histogram(samples, bins=60, density=True)
    x = np.linspace(edges[0], edges[-1], 200)
    chi = st.chi(df=16).pdf(x)
    ray = st.rayleigh(scale=samples.mean() / np.sqrt(np.pi / 2)).pdf(x)
    rep = {"traces": {"coil_combination": {"evidence": {
        "histogram": {"edges": edges.tolist(), "counts": counts.tolist()},
        "density_x": x.tolist(),
        "densities": {"gaussian": None, "rayleigh": ray.tolist(), "noncentral_chi": chi.tolist()},
        "chosen": "noncentral_chi", "effective_channels": 8, "sigma": 1.0,
        "statistics": {"rayleigh": {"statistic": 0.3, "p_value": 1e-9},
                       "noncentral_chi": {"statistic": 0.01, "p_value": 0.6}},
        "n_background": 20000}}}}
    fig = figures.build_background_noise(rep)
    ax = fig.axes[0]
    lines = {ln.get_label(): ln for ln in ax.get_lines()}
    chosen = [lbl for lbl in lines if "[chosen]" in lbl]
    assert len(chosen) == 1 and "L = 8" in chosen[0] and "non-central chi" in chosen[0]
    np.testing.assert_allclose(lines[chosen[0]].get_ydata(), chi)
    ray_lbl = next(lbl for lbl in lines if lbl.startswith("Rayleigh"))
    np.testing.assert_allclose(lines[ray_lbl].get_ydata(), ray)
    assert lines[chosen[0]].get_linewidth() > lines[ray_lbl].get_linewidth()
    assert lines[chosen[0]].get_linestyle() != lines[ray_lbl].get_linestyle()
    assert not any(lbl.startswith("Gaussian") for lbl in lines)
    # the histogram is a density: its area is 1 (numpy.histogram(density=True))
    assert float((np.diff(edges) * counts).sum()) == pytest.approx(1.0, rel=1e-9)


def test_grey_levels_mark_clip_values() -> None:
    """Truth: an 8-bit image clipped at 0 and 255 (2 % and 1 % of samples)."""
    counts = np.ones(256)
    counts[0], counts[255] = 500, 250
    rep = {"traces": {"intensity_quantization": {"evidence": {
        "histogram": {"edges": list(np.arange(257) - 0.5), "counts": counts.tolist()},
        "clipped_low_fraction": 0.02, "clipped_high_fraction": 0.01, "clip_values": [0, 255],
        "distinct_levels": 256, "stated_bits": 16, "comb_score": 0.1}}}}
    fig = figures.build_grey_levels(rep)
    ax = fig.axes[0]
    v = {ln.get_label(): ln.get_xdata()[0] for ln in ax.get_lines()}
    assert v["low clip (2.00 % of samples)"] == 0
    assert v["high clip (1.00 % of samples)"] == 255
    assert "256 distinct levels" in ax.get_title() and "16-bit" in ax.get_title()


def test_block_tables_show_annex_k_at_matched_quality() -> None:
    """The right-hand table is T.81 Annex K luminance scaled to quality 75
    (libjpeg scaling); each cell's printed number equals that table's entry."""
    matched = scaled_table(75)
    est = matched.astype(float).copy()
    est[6:, 6:] = np.nan
    est_list = [[None if np.isnan(v) else float(v) for v in row] for row in est]
    rep = {"traces": {"lossy_compression": {"estimates": {"quality": 75}, "evidence": {
        "blocking_signature": {"rows": [3, 1, 1, 1, 1, 1, 1, 1], "cols": [3, 1, 1, 1, 1, 1, 1, 1]},
        "estimated_table": est_list, "matched_table": matched.tolist(),
        "fit_error": 0.2, "block_origin": [0, 0]}}}}
    fig = figures.build_block_signature(rep)
    ax_sig, ax_est, ax_match = fig.axes[:3]
    assert "quality 75" in ax_match.get_title()
    printed = np.array([float(t.get_text()) for t in ax_match.texts]).reshape(8, 8)
    np.testing.assert_array_equal(printed, matched)
    est_texts = [t.get_text() for t in ax_est.texts]
    assert est_texts.count("·") == 4
    np.testing.assert_allclose(ax_sig.get_lines()[0].get_ydata(), [3, 1, 1, 1, 1, 1, 1, 1])


def test_periodicity_marks_peaks() -> None:
    """Truth: upsampling by 4/3 leaves a residual peak at 1/4 cycle/sample
    (period 4 samples of the output grid, common practice, no source)."""
    f = np.linspace(0, 0.5, 101)
    p = 1 + 20 * np.exp(-((f - 0.25) / 0.005) ** 2)
    rep = {"traces": {"resampling": {"evidence": {"periodicity": {
        "cols": {"freq": f.tolist(), "power": p.tolist(), "peaks": [0.25]}}}}}}
    fig = figures.build_periodicity(rep)
    marks = [ln for ln in fig.axes[0].get_lines() if ln.get_marker() == "v"]
    assert marks[0].get_xdata()[0] == pytest.approx(0.25)
    assert marks[0].get_ydata()[0] == pytest.approx(21.0, rel=1e-3)


def test_missing_keys_skip_figures() -> None:
    """No evidence, wrong shapes, or nulls: the figure is unavailable, not an error."""
    assert figures.available(None) == []
    bad = {"traces": {
        "zero_filling": {"evidence": {"spectrum_map_db": None, "profiles_db": {"rows": []}}},
        "coil_combination": {"evidence": {"histogram": {"edges": [0, 1], "counts": [1, 2]}}},
        "lossy_compression": {"evidence": {"blocking_signature": None}},
        "resampling": {"evidence": {"periodicity": {"rows": {"freq": [0], "power": [1, 2]}}}},
        "intensity_quantization": {"status": "absent"},
    }}
    assert figures.available(bad) == []
    for name in figures.FIGURES:
        assert figures.render(name, bad) is None
    with pytest.raises(KeyError):
        figures.render("nonexistent", bad)


def test_png_decodes_and_is_not_blank(zf_report: dict) -> None:
    """Rendered PNG bytes decode with Pillow, have a sensible size and real content."""
    names = [s.name for s in figures.available(zf_report)]
    assert names == ["spectrum_map", "kspace_profiles"]
    for name in names:
        px = _decode(figures.render(name, zf_report))
        assert px.shape[0] >= 250 and px.shape[1] >= 400
        assert px.std() > 10 and (px < 128).mean() > 0.01


def test_every_spec_has_caption_about_raw_data() -> None:
    """Every figure says what a raw acquisition would look like instead."""
    for spec in figures.FIGURES.values():
        assert "raw" in spec.caption.lower() or "acquired grid" in spec.caption.lower()


def test_preview_png_roundtrip() -> None:
    """A uint8 preview comes back byte-identical from the PNG (lossless)."""
    a = (np.arange(64 * 48) % 256).astype(np.uint8).reshape(48, 64)
    np.testing.assert_array_equal(_decode(figures.preview_png(a)), a)
    with pytest.raises(ValueError):
        figures.preview_png(np.zeros(5, dtype=np.uint8))


def test_effective_curve_marks_the_calculators_value() -> None:
    """The chart draws the dataset curve, the raw curve and the calculator's own R_eff
    at the chosen R (not a value read off the coarser curve)."""
    curves = {"nominal": [2, 4, 8], "dataset": [1.2, 2.3, 4.1], "raw": [2, 4, 8],
              "family": "polynomial", "dims": "cols"}
    fig = figures.build_effective_curve(curves, marker=4.0, marker_effective=2.42)
    lines = {ln.get_label(): ln for ln in fig.axes[0].get_lines()}
    np.testing.assert_allclose(lines["this dataset's acquired support"].get_ydata(),
                               [1.2, 2.3, 4.1])
    np.testing.assert_allclose(lines["raw acquisition (full grid)"].get_ydata(), [2, 4, 8])
    mark = lines["R = 4: R_eff = 2.42"]
    assert mark.get_xdata()[0] == 4.0 and mark.get_ydata()[0] == pytest.approx(2.42)


def test_calculator_support_rule_matches_sampling_command(tmp_path) -> None:
    """The page reads the true support from a report exactly as ``rawproof sampling
    --from-report`` does (app.sampling.support_from_report, the reference), and
    its answer is app.sampling.effective_rate's with the command's defaults
    (20 masks, seed 0). Truth: cols support 0.5 of 256, rows full."""
    import json

    from app import sampling
    from app.cli.sampling import support_from_report_file
    from app.web import evidence

    rep = {"input": {"shape": [3, 256, 256]}, "traces": {"zero_filling": {
        "status": "present", "estimates": {
            "rows": {"support_fraction": 1.0, "padding_factor": 1.0},
            "cols": {"support_fraction": 0.5, "padding_factor": 2.0}}}}}
    path = tmp_path / "r.json"
    path.write_text(json.dumps(rep))
    ref = support_from_report_file(str(path))
    sup = evidence.measured_support(rep)
    assert sup["shape"] == ref["shape"] and sup["support"] == ref["support"] == [1.0, 0.5]
    got = evidence.effective_summary(rep, family="polynomial", acceleration=4.0, dims=1,
                                     axis="cols")
    want = sampling.effective_rate((256, 256), (1.0, 0.5), "polynomial", 4.0, dims=1,
                                   axis="cols", n_masks=20, seed=0)
    assert got["effective_acceleration"] == want["effective_acceleration"]
    assert got["raw_effective_acceleration"] == pytest.approx(4.0, rel=0.05)
    with pytest.raises(Exception, match="acceleration"):
        evidence.effective_summary(rep, family="polynomial", acceleration=99.0)
    opts = evidence.calculator_options(rep)
    assert opts["default"]["axis"] == "cols" and "128 of 256 cols" in opts["support_text"]
