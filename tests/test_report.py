"""Tests of fieldfix.report: the numbers, the edge-agreement measure, figure data and the page.

Figures are checked through their data (colour limits, colour maps, labels), never pixels.
"""

from __future__ import annotations

import json
import math
import re
from html.parser import HTMLParser

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from fieldfix import report as rp
from fieldfix.errors import InputError, OutputError

from _report_fixtures import affine, anatomy, write_outputs

EYE = np.eye(4)


def _grid(n=8):
    return np.meshgrid(*(np.arange(n, dtype=float),) * 3, indexing="ij")


# ---------------------------------------------------------------- edge agreement


@pytest.mark.parametrize("theta_deg", [0.0, 20.0, 45.0, 60.0, 90.0])
def test_edge_agreement_of_ramps_is_cos_squared(theta_deg):
    # Analytic case: two linear ramps whose gradients make an angle theta. Every voxel has
    # n_I . n_R = cos(theta) |n|^2, so the normalised NGF measure (Haber and Modersitzki
    # 2006, MICCAI) equals cos^2(theta) exactly.
    i, j, k = _grid()
    t = math.radians(theta_deg)
    image = 3.0 * i
    reference = 5.0 * (math.cos(t) * i + math.sin(t) * j)
    assert rp.edge_agreement(image, reference, EYE) == pytest.approx(math.cos(t) ** 2, abs=1e-12)


def test_edge_agreement_uses_world_millimetres():
    # On an anisotropic grid, f = i and g = i + j have gradients (1/dx, 0) and (1/dx, 1/dy)
    # in mm; the angle between them is atan(dx / dy).
    i, j, k = _grid()
    dx, dy = 1.0, 3.0
    expected = math.cos(math.atan2(dx, dy)) ** 2
    got = rp.edge_agreement(i, i + j, np.diag([dx, dy, 2.0, 1.0]))
    assert got == pytest.approx(expected, abs=1e-12)


def test_edge_agreement_invariant_to_scale_offset_and_contrast_inversion():
    anat = anatomy()
    rng = np.random.default_rng(1)
    noisy = anat + rng.normal(0, 2.0, anat.shape)
    base = rp.edge_agreement(noisy, anat, affine())
    assert rp.edge_agreement(7.0 * noisy + 30.0, anat, affine()) == pytest.approx(base, rel=1e-9)
    assert rp.edge_agreement(-noisy, 0.01 * anat, affine()) == pytest.approx(base, rel=1e-9)
    assert rp.edge_agreement(noisy, anat, affine()) == pytest.approx(rp.edge_agreement(anat, noisy, affine()))


def test_edge_agreement_falls_as_the_image_moves_away():
    anat = anatomy()
    scores = [rp.edge_agreement(np.roll(anat, s, axis=1), anat, affine()) for s in range(4)]
    assert scores[0] == pytest.approx(1.0)
    assert all(a > b for a, b in zip(scores, scores[1:]))


@settings(max_examples=25, deadline=None)
@given(st.integers(0, 2**31 - 1))
def test_edge_agreement_is_between_zero_and_one(seed):
    rng = np.random.default_rng(seed)
    a, b = rng.normal(size=(2, 6, 5, 4))
    mask = rng.random((6, 5, 4)) > 0.3
    value = rp.edge_agreement(a, b, EYE, mask)
    assert 0.0 <= value <= 1.0 + 1e-12


def _ngf_reference(a, b, spacing, mask=None):
    """Independent plain-numpy NGF (Haber and Modersitzki 2006) on an axis-aligned grid."""
    mask = np.ones(a.shape, bool) if mask is None else mask

    def normalised(x):
        g = np.stack(np.gradient(x, *spacing), axis=-1)
        size = np.sqrt((g**2).sum(-1))
        inside = size[mask]
        eps = np.median(inside[inside > 0])
        return g / np.sqrt(size**2 + eps**2)[..., None]

    na, nb = normalised(a), normalised(b)
    return ((na * nb).sum(-1) ** 2, (na * na).sum(-1) ** 2, (nb * nb).sum(-1) ** 2)


def test_edge_agreement_by_slice_against_plain_numpy():
    anat = anatomy()
    moved = np.roll(anat, 2, axis=1)
    per_slice = rp.edge_agreement_by_slice(moved, anat, affine())
    cross, self_a, self_b = _ngf_reference(moved, anat, (2.5, 2.5, 3.0))
    expected = cross.sum((0, 1)) / np.sqrt(self_a.sum((0, 1)) * self_b.sum((0, 1)))
    assert per_slice.shape == (anat.shape[2],)
    assert np.allclose(per_slice, expected, rtol=1e-10)
    whole = cross.sum() / np.sqrt(self_a.sum() * self_b.sum())
    assert rp.edge_agreement(moved, anat, affine()) == pytest.approx(whole, rel=1e-10)


def test_edge_agreement_in_a_small_mask_against_plain_numpy_on_the_whole_grid():
    # The implementation crops to the mask's bounding box; the reference does not.
    anat = anatomy()
    moved = np.roll(anat, 1, axis=1) + np.random.default_rng(2).normal(0, 1.0, anat.shape)
    mask = np.zeros(anat.shape, bool)
    mask[3:9, 15:25, 0:4] = True  # touches the grid edge along k
    cross, self_a, self_b = _ngf_reference(moved, anat, (2.5, 2.5, 3.0), mask)
    expected = cross[mask].sum() / np.sqrt(self_a[mask].sum() * self_b[mask].sum())
    assert rp.edge_agreement(moved, anat, affine(), mask) == pytest.approx(expected, rel=1e-10)
    per_slice = rp.edge_agreement_by_slice(moved, anat, affine(), mask)
    assert np.isnan(per_slice[4:]).all() and np.isfinite(per_slice[:4]).all()


def test_edge_agreement_rejects_mismatched_shapes():
    with pytest.raises(InputError):
        rp.edge_agreement(np.zeros((3, 3, 3)), np.zeros((3, 3, 4)), EYE)


# ---------------------------------------------------------------- numbers


def test_field_statistics_against_numpy():
    rng = np.random.default_rng(3)
    field = rng.normal(0, 80, (10, 9, 8))
    mask = rng.random(field.shape) > 0.4
    stats = rp.field_statistics(field, mask, voxel_volume_mm3=8.0, unaliased_hz=150.0)
    inside = field[mask]
    assert stats["percentiles_hz"]["p5"] == pytest.approx(np.percentile(inside, 5))
    assert stats["percentiles_hz"]["p99"] == pytest.approx(np.percentile(inside, 99))
    assert stats["min_hz"] == inside.min() and stats["max_hz"] == inside.max()
    assert stats["mask_volume_ml"] == pytest.approx(mask.sum() * 8.0 / 1000.0)
    assert stats["voxels_beyond_unaliased"] == int(np.sum(np.abs(inside) > 150.0))


def test_shift_statistics_counts_in_mask_only():
    shift = np.zeros((4, 4, 1))
    shift[0, 0, 0] = 3.0  # outside the mask below
    shift[1, 1, 0] = -1.5
    shift[2, 2, 0] = 0.9
    mask = np.ones_like(shift, bool)
    mask[0, 0, 0] = False
    folds = np.zeros_like(mask)
    folds[0, 0, 0] = folds[1, 1, 0] = True
    s = rp.shift_statistics(shift, 2.0, mask, fold_mask=folds)
    assert s["max_abs_shift_mm"] == 3.0 and s["max_abs_shift_vox"] == 1.5
    assert s["percent_over_one_voxel"] == pytest.approx(100.0 / 15.0)
    assert s["folded_voxels"] == 1 and s["folded_voxels_total"] == 2


def test_mask_coverage_low_for_a_small_mask():
    anat = anatomy()
    full = anat > 20
    assert rp.mask_coverage(full, anat) > 0.95
    half = full.copy()
    half[: anat.shape[0] // 2] = False
    assert rp.mask_coverage(half, anat) < 0.6


def test_collect_warnings_rules():
    numbers = {
        "field_maps": [{"name": "b0_hz", "voxels_beyond_unaliased": 4, "percent_beyond_unaliased": 0.1,
                        "unaliased_range_hz": 200.0, "mask_coverage": 0.5}],
        "runs": [
            {"stem": "a", "folded_voxels": 0, "edge_agreement_before": 0.80, "edge_agreement_after": 0.70,
             "slices_worse": [3, 4]},
            {"stem": "b", "folded_voxels": 2, "edge_agreement_before": 0.80, "edge_agreement_after": 0.805,
             "percent_over_one_voxel": 12.0},
            {"stem": "c", "folded_voxels": 0, "edge_agreement_before": 0.80, "edge_agreement_after": 0.90,
             "percent_over_one_voxel": 12.0},
            # whole mask barely changes, but the shifted region improves: no warning
            {"stem": "d", "edge_agreement_before": 0.80, "edge_agreement_after": 0.801,
             "edge_agreement_shifted_before": 0.55, "edge_agreement_shifted_after": 0.75,
             "percent_over_one_voxel": 3.0},
            # the shifted region gets worse although the whole mask looks fine
            {"stem": "e", "edge_agreement_before": 0.80, "edge_agreement_after": 0.80,
             "edge_agreement_shifted_before": 0.70, "edge_agreement_shifted_after": 0.60,
             "percent_over_one_voxel": 3.0},
        ],
    }
    found = {(w["code"], w["where"]) for w in rp.collect_warnings(numbers)}
    assert found == {
        ("field_beyond_unaliased_range", "b0_hz"),
        ("low_mask_coverage", "b0_hz"),
        ("edges_worse", "a"),
        ("edges_disagree_slices", "a"),
        ("folds", "b"),
        ("edges_unchanged", "b"),
        ("edges_worse", "e"),
    }
    assert rp.collect_warnings({"field_maps": [{"mask_coverage": 0.9}], "runs": [{"stem": "c"}]}) == []


# ---------------------------------------------------------------- figure data


def _lightness(cmap_name, n=33):
    import matplotlib
    from skimage.color import rgb2lab

    rgb = matplotlib.colormaps[cmap_name](np.linspace(0, 1, n))[:, :3]
    return rgb2lab(rgb[None])[0, :, 0]


def test_field_map_figure_has_symmetric_limits_and_units():
    rng = np.random.default_rng(0)
    field = rng.normal(20.0, 40.0, (12, 12, 8))
    field[3, 3, 3] = -170.0
    mask = np.ones(field.shape, bool)
    fig = rp.field_map_figure(field, EYE, mask)
    images = [ax.images[0] for ax in fig.axes if ax.images]
    lo, hi = images[0].get_clim()
    assert lo == -hi and hi > 0
    assert hi >= np.percentile(np.abs(field), 99.9)
    assert all(im.get_clim() == (lo, hi) for im in images)  # every panel shares the scale
    colourbars = [ax for ax in fig.axes if ax.get_ylabel()]
    assert any("Hz" in ax.get_ylabel() for ax in colourbars)
    assert images[0].get_cmap().name.startswith(rp._DIVERGING)


def test_diverging_map_is_symmetric_in_lightness_and_monotone_per_half():
    # Perceptual check with an external colour library (scikit-image CIELAB conversion):
    # lightness is symmetric about the centre and rises monotonically towards it, so
    # +x Hz and -x Hz look equally strong (Moreland 2009, ISVC, design goal).
    light = _lightness(rp._DIVERGING)
    assert np.allclose(light, light[::-1], atol=1.0)
    half = light[: len(light) // 2 + 1]
    assert np.all(np.diff(half) > 0)
    sequential = _lightness(rp._SEQUENTIAL)
    assert np.all(np.diff(sequential) > 0)  # the retention scale is monotone in lightness


def test_shift_and_jacobian_figures_are_centred():
    rng = np.random.default_rng(5)
    shift = rng.normal(0.5, 2.0, (10, 10, 6))
    lo, hi = rp.shift_figure(shift, EYE).axes[0].images[0].get_clim()
    assert lo == -hi and hi >= np.percentile(np.abs(shift), 99.9)
    jac = 1.0 + rng.normal(0, 0.3, (10, 10, 6))
    folds = jac < 0.1
    fig = rp.jacobian_figure(jac, EYE, fold_mask=folds)
    lo, hi = fig.axes[0].images[0].get_clim()
    assert lo + hi == pytest.approx(2.0)
    assert rp.retention_figure(np.clip(jac, 0, 1), EYE).axes[0].images[0].get_clim() == (0.0, 1.0)


def test_before_and_after_figures_share_slices_and_grey_scale():
    anat = anatomy()
    moved = np.roll(anat, 2, axis=1)
    mask = anat > 20
    limits = rp.intensity_limits(moved, anat, mask=mask)
    before = rp.epi_outline_figure(moved, anat, affine(), limits=limits, panels_mask=mask)
    after = rp.epi_outline_figure(anat, anat, affine(), limits=limits, panels_mask=mask)
    titles = lambda fig: [t.get_text() for ax in fig.axes for t in ax.texts if t.get_text().startswith("z=")]
    assert titles(before) == titles(after) and len(titles(before)) >= 3
    assert before.axes[0].images[0].get_clim() == after.axes[0].images[0].get_clim() == limits
    # The reference outline is an Otsu iso-contour drawn on every panel.
    assert all(len(ax.collections) >= 1 for ax in before.axes)


def test_symmetric_limit_rounds_up_to_a_nice_number():
    assert rp.symmetric_limit([-0.0]) == 1.0
    for top, nice in [(37.0, 50.0), (180.0, 200.0), (0.23, 0.25), (9.0, 10.0), (1000.0, 1000.0)]:
        assert rp.symmetric_limit([top], percentile=100) == pytest.approx(nice)


# ---------------------------------------------------------------- the page


class _Numbers(HTMLParser):
    """Collect (data-key, data-value, data-format, text) of every number cell."""

    def __init__(self):
        super().__init__()
        self.cells, self._open, self.sources, self.text = [], None, [], []

    def handle_starttag(self, tag, attrs):
        attrs = dict(attrs)
        if "data-key" in attrs:
            self._open = [attrs["data-key"], attrs["data-value"], attrs["data-format"], ""]
        for name in ("src", "href"):
            if name in attrs:
                self.sources.append(attrs[name])

    def handle_data(self, data):
        self.text.append(data)
        if self._open is not None:
            self._open[3] += data

    def handle_endtag(self, tag):
        if self._open is not None and tag == "td":
            self.cells.append(tuple(self._open))
            self._open = None


@pytest.fixture(scope="module")
def built(tmp_path_factory):
    root = tmp_path_factory.mktemp("report")
    expected = write_outputs(root)
    page = rp.build_report(expected["out"])
    return expected, page, json.loads(page.with_name("report.json").read_text())


def test_build_report_writes_three_files(built):
    expected, page, data = built
    assert page.name == "report.html"
    assert page.with_name("report_summary.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert page.stat().st_size < rp.MAX_PAGE_BYTES
    assert data["report"]["html_bytes"] == page.stat().st_size


def test_report_numbers_match_independent_values(built):
    expected, page, data = built
    fmap, run, drop = data["field_maps"][0], data["runs"][0], data["dropout"][0]
    assert fmap["max_hz"] == pytest.approx(expected["field_max_hz"], abs=1e-3)
    assert fmap["min_hz"] == pytest.approx(expected["field_min_hz"], abs=1e-3)
    assert fmap["percentiles_hz"]["p50"] == pytest.approx(expected["field_p50_hz"], abs=1e-3)
    assert fmap["unaliased_range_hz"] == pytest.approx(expected["unaliased_hz"])
    assert fmap["voxels_beyond_unaliased"] == expected["beyond_unaliased"] > 0
    assert fmap["mask_volume_ml"] == pytest.approx(expected["mask_volume_ml"])
    assert run["stem"] == expected["stem"]
    assert run["distorted"].endswith(f"raw/{expected['stem']}.nii.gz")
    assert run["max_abs_shift_mm"] == pytest.approx(expected["max_abs_shift_mm"], rel=1e-5)
    assert run["percent_over_one_voxel"] == pytest.approx(expected["percent_over_one_voxel"])
    assert run["folded_voxels"] == expected["folded_voxels"]
    assert run["timing"]["echo_spacing_s"] == pytest.approx(0.0005)
    # timing rows read as words with their unit, not as raw keys
    html_text = page.read_text(encoding="utf-8")
    row = re.search(r"<tr><td>Timing: Echo spacing</td><td[^>]*>([^<]*)</td><td class=\"unit\">s</td>", html_text)
    assert row and float(row.group(1)) == pytest.approx(0.0005)
    assert "Timing: echo_spacing_s" not in html_text
    assert drop["retention"]["median"] == pytest.approx(expected["retention_median"], abs=1e-6)
    assert drop["retention"]["percent_below_threshold"] == pytest.approx(expected["retention_below"])
    assert data["plans"][0]["recommended"].startswith("2 mm")


def test_correction_raises_edge_agreement(built):
    _, _, data = built
    run = data["runs"][0]
    assert run["edge_agreement_after"] > run["edge_agreement_before"] + 0.02
    # Where voxels moved, the gain is larger than over the whole mask.
    assert run["shifted_region_voxels"] >= 50
    gain_shifted = run["edge_agreement_shifted_after"] - run["edge_agreement_shifted_before"]
    assert gain_shifted > run["edge_agreement_after"] - run["edge_agreement_before"]
    assert run["slices_worse"] == []
    codes = {w["code"] for w in data["warnings"]}
    assert codes == {"field_beyond_unaliased_range", "folds"}


def test_page_numbers_equal_report_json(built):
    _, page, data = built
    parser = _Numbers()
    parser.feed(page.read_text(encoding="utf-8"))
    assert len(parser.cells) >= 25
    for key, value_text, fmt, shown in parser.cells:
        value = rp._lookup(data, key)
        if isinstance(value, dict):
            value = json.dumps(value)
        assert json.loads(value_text) == value, key
        assert shown == rp.format_number(value, fmt), key
    keys = {c[0] for c in parser.cells}
    for needed in ("runs.0.max_abs_shift_mm", "runs.0.percent_over_one_voxel", "runs.0.folded_voxels",
                   "runs.0.edge_agreement_before", "runs.0.edge_agreement_after", "field_maps.0.unaliased_range_hz",
                   "field_maps.0.percentiles_hz.p99", "dropout.0.retention.percent_below_threshold"):
        assert needed in keys


def test_page_is_self_contained_with_caution_and_order(built):
    _, page, _ = built
    text = page.read_text(encoding="utf-8")
    parser = _Numbers()
    parser.feed(text)
    assert parser.sources and all(s.startswith("data:") for s in parser.sources)
    assert "http://" not in text and "https://" not in text and "@import" not in text
    assert rp.CAUTION in text
    # numbers, then warnings, then figures
    assert text.index('id="numbers"') < text.index('id="warnings-heading"') < text.index('id="figures"')
    assert 'class="compare"' in text


def test_refuses_to_overwrite_and_replaces_when_asked(built, tmp_path):
    expected, page, _ = built
    with pytest.raises(OutputError):
        rp.build_report(expected["out"])
    out = rp.build_report(expected["out"], out_path=tmp_path / "qc" / "sub-01.html", title="Sub 01")
    assert out == tmp_path / "qc" / "sub-01.html"
    assert (tmp_path / "qc" / "sub-01_summary.png").is_file()
    assert json.loads((tmp_path / "qc" / "sub-01.json").read_text())["report"]["title"] == "Sub 01"
    rp.build_report(expected["out"], out_path=tmp_path / "qc" / "sub-01.html", overwrite=True)


def test_wrong_polarity_is_flagged(tmp_path):
    # A correction applied with the wrong sign doubles the distortion: the edge agreement
    # must fall and the page must say so.
    expected = write_outputs(tmp_path, wrong_polarity=True, folded_voxels=0, with_dropout=False, with_plan=False)
    page = rp.build_report(expected["out"])
    data = json.loads(page.with_name("report.json").read_text())
    run = data["runs"][0]
    assert run["edge_agreement_after"] < run["edge_agreement_before"]
    assert "edges_worse" in {w["code"] for w in data["warnings"]}
    assert 'data-code="edges_worse"' in page.read_text(encoding="utf-8")


def test_partial_folders(tmp_path):
    expected = write_outputs(tmp_path, with_plan=False)
    out = expected["out"]
    # Without the field map, the run section still works (mask from the EPI, no edge numbers).
    for name in ("b0_hz.nii.gz", "b0_hz.json", "b0_mask.nii.gz", "b0_magnitude.nii.gz", "b0_summary.json"):
        (out / name).unlink()
    data = json.loads(rp.build_report(out).with_name("report.json").read_text())
    assert data["field_maps"] == [] and data["runs"][0]["edge_agreement_after"] is None
    assert data["runs"][0]["mask_source"].startswith("corrected EPI")
    assert data["runs"][0]["folded_voxels"] >= 0


def test_empty_or_missing_folder_is_an_input_error(tmp_path):
    with pytest.raises(InputError, match="no fieldfix outputs"):
        rp.build_report(tmp_path)
    with pytest.raises(InputError):
        rp.build_report(tmp_path / "nope")


# ---------------------------------------------------------------- command line


def _script():
    import shutil
    import sys
    from pathlib import Path

    return shutil.which("fieldfix", path=str(Path(sys.executable).parent)) or shutil.which("fieldfix")


def test_cli_report_through_the_console_script(tmp_path):
    import subprocess

    expected = write_outputs(tmp_path, with_plan=False)
    script = _script()
    assert script, "the fieldfix console script is not installed"
    result = subprocess.run([script, "report", str(expected["out"]), "--out", str(tmp_path / "qc"), "--json"],
                            capture_output=True, text=True, timeout=120)
    assert result.returncode == 0, result.stderr
    summary = json.loads(result.stdout)
    assert summary["report"] == str(tmp_path / "qc" / "report.html")
    assert any("fold" in w for w in summary["warnings"])
    again = subprocess.run([script, "report", str(expected["out"]), "--out", str(tmp_path / "qc")],
                           capture_output=True, text=True, timeout=120)
    assert again.returncode == 2 and "overwrite" in again.stderr
    missing = subprocess.run([script, "report", str(tmp_path / "absent")], capture_output=True, text=True, timeout=60)
    assert missing.returncode == 2 and len(missing.stderr.strip().splitlines()) == 1


# ---------------------------------------------------------------- a real workflow output


def test_report_of_a_real_unwarp_output(tmp_path):
    unwarp = pytest.importorskip("fieldfix.workflows.unwarp")
    expected = write_outputs(tmp_path, with_dropout=False, with_plan=False)
    raw = tmp_path / "raw" / f"{expected['stem']}.nii.gz"
    out = tmp_path / "unwarped"
    summaries = unwarp.run_unwarp([raw], expected["out"] / "b0_hz.nii.gz", out, pe_code="j-",
                                  echo_spacing_s=0.0005)
    page = rp.build_report(out)
    data = json.loads(page.with_name("report.json").read_text())
    run, workflow = data["runs"][0], summaries[0]
    # The B0 map lives in another folder: found through the unwarp summary, shown too.
    assert data["field_maps"][0]["file"] == str(expected["out"] / "b0_hz.nii.gz")
    assert run["distorted"] == str(raw)
    assert run["mask_source"].startswith("b0_mask")
    # Same numbers as the workflow's own summary (same mask, same shift map).
    assert run["max_abs_shift_mm"] == pytest.approx(workflow.max_abs_shift_mm, rel=1e-6)
    assert run["percent_over_one_voxel"] == pytest.approx(workflow.percent_shifted_over_1_voxel)
    assert run["folded_voxels"] == workflow.folded_voxels
    assert run["timing"]["echo_spacing_s"] == pytest.approx(0.0005)
    # The real correction moves EPI edges towards the anatomy.
    assert run["edge_agreement_after"] > run["edge_agreement_before"] + 0.01
    assert not {"edges_worse", "edges_unchanged"} & {w["code"] for w in data["warnings"]}


def test_report_of_real_fieldmap_and_unwarp_outputs(tmp_path):
    fieldmap = pytest.importorskip("fieldfix.workflows.fieldmap")
    unwarp = pytest.importorskip("fieldfix.workflows.unwarp")
    synthetic = write_outputs(tmp_path / "synthetic", with_dropout=False, with_plan=False)
    out = tmp_path / "derived"
    fm = fieldmap.run_fieldmap(out, b0=synthetic["out"] / "b0_hz.nii.gz", b0_units="Hz",
                               magnitude=[synthetic["out"] / "b0_magnitude.nii.gz"], smooth_mm=0.0)
    raw = tmp_path / "synthetic" / "raw" / f"{synthetic['stem']}.nii.gz"
    unwarp.run_unwarp([raw], out / "b0_hz.nii.gz", out, pe_code="j-", echo_spacing_s=0.0005)
    data = json.loads(rp.build_report(out).with_name("report.json").read_text())
    fmap = data["field_maps"][0]
    # Our percentiles (from the images) equal the field-map workflow's own (from its arrays).
    for key, value in fm.field_percentiles_hz.items():
        if key in fmap["percentiles_hz"]:
            assert fmap["percentiles_hz"][key] == pytest.approx(value, abs=1e-3), key
    assert fmap["mask_volume_ml"] == pytest.approx(fm.mask_volume_ml)
    assert fmap["voxels_offset_changed"] == fm.voxels_offset_changed
    run = data["runs"][0]
    assert run["field_map"] == "b0_hz" and run["mask_source"].startswith("b0_mask")
    assert run["edge_agreement_shifted_after"] > run["edge_agreement_shifted_before"]


def test_dropout_statistics_use_the_mask_the_prediction_was_made_for(tmp_path):
    # The dropout job writes zeros outside its own (brain) mask and names that mask in
    # dropout.json; the report must not count those zeros as lost signal.
    from fieldfix.io import load_image, save_image, write_json

    write_outputs(tmp_path, with_plan=False)
    out = tmp_path / "out"
    retention_image = load_image(out / "retention.nii.gz")
    retention = retention_image.get_fdata(np.float64)
    head = load_image(out / "b0_mask.nii.gz").get_fdata() > 0
    brain = np.zeros_like(head)
    brain[4:-4, 4:-4, 2:-2] = True
    brain &= head
    save_image(tmp_path / "brain_mask.nii.gz", brain, retention_image.affine)
    save_image(out / "retention.nii.gz", np.where(brain, retention, 0.0), retention_image.affine, overwrite=True)
    write_json(out / "dropout.json", {"retention_threshold": 0.5, "te_s": 0.03,
                                      "mask": str(tmp_path / "brain_mask.nii.gz")}, overwrite=True)
    data = json.loads(rp.build_report(out).with_name("report.json").read_text())
    stats = data["dropout"][0]["retention"]
    assert stats["mask_source"] == "dropout mask"
    assert stats["mask_voxels"] == int(brain.sum()) < int(head.sum())
    assert stats["percent_below_threshold"] == pytest.approx(100.0 * np.mean(retention[brain] < 0.5))
