"""Tests of fieldfix.report: edge agreement, orientation, colour scales, the figures' data,
the discovery rules and the page built from real job outputs.

Figures are checked through their data (limits, colour maps, texts, positions), never pixels.
"""

from __future__ import annotations

import base64
import hashlib
import html
import json
import math
import re
import shutil
from html.parser import HTMLParser

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from fieldfix import report as rp
from fieldfix.errors import InputError, OutputError
from fieldfix.outputs import DemoChecks, ReportSummary, UnwarpSummary
from fieldfix.report import stats
from fieldfix.report.orientation import DisplayGrid, direction_letters

from _report_fixtures import affine, anatomy, plan_row, write_outputs

EYE = np.eye(4)


def _grid(n=8):
    return np.meshgrid(*(np.arange(n, dtype=float),) * 3, indexing="ij")


# ---------------------------------------------------------------- edge agreement


@pytest.mark.parametrize("theta_deg", [0.0, 20.0, 45.0, 60.0, 90.0])
def test_edge_agreement_of_ramps_is_cos_squared(theta_deg):
    # Analytic case: two linear ramps whose gradients make an angle theta. Every voxel has
    # n_I . n_R = cos(theta) |n|^2, so the normalised NGF measure (Haber and Modersitzki
    # 2006, MICCAI) equals cos^2(theta) exactly; the phase-encode weight is then the same
    # in every voxel and cancels.
    i, j, k = _grid()
    t = math.radians(theta_deg)
    image = 3.0 * i
    reference = 5.0 * (math.cos(t) * i + math.sin(t) * j)
    assert rp.edge_agreement(image, reference, EYE) == pytest.approx(math.cos(t) ** 2, abs=1e-12)
    if theta_deg < 90.0:
        assert rp.edge_agreement(image, reference, EYE, along=0) == pytest.approx(math.cos(t) ** 2, abs=1e-12)


def test_edge_agreement_uses_world_millimetres():
    # On an anisotropic grid, f = i and g = i + j have gradients (1/dx, 0) and (1/dx, 1/dy)
    # in mm; the angle between them is atan(dx / dy).
    i, j, k = _grid()
    dx, dy = 1.0, 3.0
    expected = math.cos(math.atan2(dx, dy)) ** 2
    assert rp.edge_agreement(i, i + j, np.diag([dx, dy, 2.0, 1.0])) == pytest.approx(expected, abs=1e-12)


def test_edges_that_distortion_cannot_move_do_not_count_along_the_phase_encode_axis():
    # Two regions: in one the reference's edges face the phase-encode axis j and the image
    # agrees; in the other they face i (B0 distortion along j cannot move them) and the
    # image's edges are perpendicular. Unweighted, the second region halves the measure;
    # weighted along j it has weight 0 and the agreement is 1.
    i, j, k = _grid(10)
    reference = np.where(i < 5, 3.0 * j, 3.0 * i)
    image = 3.0 * j
    mask = np.zeros(i.shape, bool)
    mask[1:3] = True
    mask[7:9] = True
    assert rp.edge_agreement(image, reference, EYE, mask) == pytest.approx(0.5, abs=1e-12)
    assert rp.edge_agreement(image, reference, EYE, mask, along=1) == pytest.approx(1.0, abs=1e-12)
    assert math.isnan(rp.edge_agreement(image, 3.0 * i, EYE, mask, along=1))


def test_edge_agreement_invariant_to_scale_offset_and_contrast_inversion():
    anat = anatomy()
    noisy = anat + np.random.default_rng(1).normal(0, 2.0, anat.shape)
    for along in (None, 1):
        base = rp.edge_agreement(noisy, anat, affine(), along=along)
        assert rp.edge_agreement(7.0 * noisy + 30.0, anat, affine(), along=along) == pytest.approx(base, rel=1e-9)
        assert rp.edge_agreement(-noisy, 0.01 * anat, affine(), along=along) == pytest.approx(base, rel=1e-9)


def test_edge_agreement_falls_as_the_image_moves_along_phase_encoding():
    anat = anatomy()
    scores = [rp.edge_agreement(np.roll(anat, s, axis=1), anat, affine(), along=1) for s in range(4)]
    assert scores[0] == pytest.approx(1.0)
    assert all(a > b for a, b in zip(scores, scores[1:]))


@settings(max_examples=25, deadline=None)
@given(st.integers(0, 2**31 - 1), st.sampled_from([None, 0, 1, 2]))
def test_edge_agreement_is_between_zero_and_one(seed, along):
    rng = np.random.default_rng(seed)
    a, b = rng.normal(size=(2, 6, 5, 4))
    value = rp.edge_agreement(a, b, EYE, rng.random((6, 5, 4)) > 0.3, along=along)
    assert 0.0 <= value <= 1.0 + 1e-12


def _ngf_reference(a, b, spacing, mask=None, along=None):
    """Independent plain-numpy NGF (Haber and Modersitzki 2006) on an axis-aligned grid."""
    mask = np.ones(a.shape, bool) if mask is None else mask

    def normalised(x):
        g = np.stack(np.gradient(x, *spacing), axis=-1)
        size = np.sqrt((g**2).sum(-1))
        inside = size[mask]
        eps = np.median(inside[inside > 0])
        return g / np.sqrt(size**2 + eps**2)[..., None]

    na, nb = normalised(a), normalised(b)
    w = np.ones(a.shape) if along is None else nb[..., along] ** 2 / np.maximum((nb**2).sum(-1), 1e-300)
    return w * (na * nb).sum(-1) ** 2, w * (na * na).sum(-1) ** 2, w * (nb * nb).sum(-1) ** 2


@pytest.mark.parametrize("along", [None, 1])
def test_edge_agreement_by_slice_against_plain_numpy(along):
    anat = anatomy()
    moved = np.roll(anat, 2, axis=1)
    cross, self_a, self_b = _ngf_reference(moved, anat, (2.5, 2.5, 3.0), along=along)
    expected = cross.sum((0, 1)) / np.sqrt(self_a.sum((0, 1)) * self_b.sum((0, 1)))
    per_slice = rp.edge_agreement_by_slice(moved, anat, affine(), along=along)
    assert np.allclose(per_slice, expected, rtol=1e-10)
    whole = cross.sum() / np.sqrt(self_a.sum() * self_b.sum())
    assert rp.edge_agreement(moved, anat, affine(), along=along) == pytest.approx(whole, rel=1e-10)


def test_edge_agreement_in_a_small_mask_against_plain_numpy_on_the_whole_grid():
    # The implementation crops to the mask's bounding box; the reference does not.
    anat = anatomy()
    moved = np.roll(anat, 1, axis=1) + np.random.default_rng(2).normal(0, 1.0, anat.shape)
    mask = np.zeros(anat.shape, bool)
    mask[3:9, 15:25, 0:4] = True  # touches the grid edge along k
    cross, self_a, self_b = _ngf_reference(moved, anat, (2.5, 2.5, 3.0), mask, along=1)
    expected = cross[mask].sum() / np.sqrt(self_a[mask].sum() * self_b[mask].sum())
    assert rp.edge_agreement(moved, anat, affine(), mask, along=1) == pytest.approx(expected, rel=1e-10)


def test_edge_agreement_rejects_mismatched_shapes():
    with pytest.raises(InputError):
        rp.edge_agreement(np.zeros((3, 3, 3)), np.zeros((3, 3, 4)), EYE)


def test_moved_region_holds_moved_voxels_and_their_paths():
    shift = np.zeros((2, 12, 1))
    shift[0, 2, 0] = 3.0  # its signal lay 3 voxels further along j
    shift[0, 9, 0] = -2.4
    shift[1, 5, 0] = 0.8  # below the threshold
    region = rp.moved_region(shift, 1, np.ones(shift.shape, bool), 1.0)
    assert np.nonzero(region[0, :, 0])[0].tolist() == [2, 3, 4, 5, 7, 8, 9]
    assert not region[1].any()
    outside = np.ones(shift.shape, bool)
    outside[0, 2, 0] = False  # a moved voxel outside the mask does not count
    assert np.nonzero(rp.moved_region(shift, 1, outside, 1.0)[0, :, 0])[0].tolist() == [7, 8, 9]


# ---------------------------------------------------------------- orientation


def _flipped_affine():
    a = np.diag([-2.0, 2.0, 3.0, 1.0])
    a[:3, 3] = [20.0, -20.0, -9.0]  # voxel i = 0 lies at x = +20 mm, the subject's right
    return a


def test_flipped_grid_is_shown_with_the_subject_right_on_the_right_edge_labelled_r():
    from fieldfix.report.figures import Scale, panel_figure
    from fieldfix.report.figures.panels import panel_rgba

    volume = np.zeros((20, 20, 4))
    volume[1:4, 14:18, :] = 1.0  # near i = 0: world x about +16 mm (right); high j: anterior
    grid = DisplayGrid.of(volume.shape, _flipped_affine())
    assert grid.edge_letters() == {"left": "L", "right": "R", "top": "A", "bottom": "P"}
    picture = panel_rgba(grid, grid.show(volume), 1, Scale("gray", 0.0, 1.0))
    bright = np.argwhere(picture[..., 0] > 0.5)
    assert bright[:, 1].min() > picture.shape[1] / 2  # drawn on the right
    assert bright[:, 0].max() < picture.shape[0] / 2  # and at the top (anterior)
    fig = panel_figure(grid, grid.show(volume), 1, Scale("gray", 0.0, 1.0))
    texts = {t.get_text(): t.get_position() for t in fig.axes[0].texts}
    assert texts["R"][0] > 0.9 and texts["L"][0] < 0.1 and texts["A"][1] > 0.9 and texts["P"][1] < 0.1
    assert "z = -6.0 mm" in texts  # slice 1: -9 mm + 3 mm


def test_oblique_grid_letters_follow_the_rotation():
    # 30 degrees about the superior axis: screen right points to (cos 30, sin 30, 0), i.e.
    # right and anterior; screen up to (-sin 30, cos 30, 0), anterior and left.
    t = math.radians(30.0)
    rotation = np.array([[math.cos(t), -math.sin(t), 0.0], [math.sin(t), math.cos(t), 0.0], [0.0, 0.0, 1.0]])
    a = np.eye(4)
    a[:3, :3] = rotation * 2.0
    grid = DisplayGrid.of((10, 10, 4), a)
    assert grid.edge_letters() == {"left": "LP", "right": "RA", "top": "AL", "bottom": "PR"}
    assert direction_letters([0.0, 0.0, -1.0]) == "I"


def test_permuted_axes_still_show_axial_planes():
    # voxel axes along y, z, x (a sagittal acquisition): the display reorders them to R, A, S.
    a = np.zeros((4, 4))
    a[1, 0], a[2, 1], a[0, 2], a[3, 3] = 2.0, 2.0, 3.0, 1.0
    grid = DisplayGrid.of((6, 7, 8), a)
    assert grid.shape == (8, 6, 7)
    assert grid.edge_letters() == {"left": "L", "right": "R", "top": "A", "bottom": "P"}
    assert grid.display_axis(0) == 1 and grid.display_axis(2) == 0


def test_slice_positions_are_world_millimetres_and_the_panel_map_is_linear():
    grid = DisplayGrid.of((6, 8, 5), affine())
    assert grid.slice_label(0) == "z = -15.0 mm" and grid.slice_label(4) == "z = -3.0 mm"
    m = grid.panel_map(2)
    centre = np.array(m["o"]) + 0.5 * np.array(m["u"]) + 0.5 * np.array(m["v"])
    assert np.allclose(centre, grid.slice_centre_mm(2))
    corner = np.array(m["o"]) + np.array(m["u"])  # top right corner of the picture
    assert np.allclose(corner, (affine() @ [5.5, 7.5, 2, 1])[:3])
    tilted = affine().copy()
    tilted[:3, 1:3] = tilted[:3, 1:3] @ np.array([[math.cos(0.5), -math.sin(0.5)], [math.sin(0.5), math.cos(0.5)]])
    assert DisplayGrid.of((6, 8, 5), tilted).slice_label(0).startswith("z \u2248")


# ---------------------------------------------------------------- colour scales and figure data


def _lightness(cmap_name, n=33):
    from skimage.color import rgb2lab

    from fieldfix.report.figures.style import colormap

    rgb = colormap(cmap_name)(np.linspace(0, 1, n))[:, :3]
    return rgb2lab(rgb[None])[0, :, 0]


@pytest.mark.parametrize("name", ["SIGNED", "RATIO"])
def test_diverging_maps_are_symmetric_in_lightness_and_monotone_per_half(name):
    # Perceptual check with an external colour library (scikit-image CIELAB): +x and -x look
    # equally strong, and lightness falls monotonically away from the centre.
    from fieldfix.report.figures import style

    light = _lightness(getattr(style, name))
    assert np.allclose(light, light[::-1], atol=3.0)
    half = light[: len(light) // 2 + 1]
    assert np.all(np.diff(half) > 0)


def test_fraction_map_is_monotone_in_lightness():
    from fieldfix.report.figures import style

    assert np.all(np.diff(_lightness(style.FRACTION)) > 0)


def test_scales_fit_the_data():
    # A brain field of about +-50 Hz with a few extreme voxels: the scale follows the 99th
    # percentile (rounded up), not the extremes and not a fixed +-250 Hz.
    rng = np.random.default_rng(0)
    field = rng.normal(0.0, 20.0, 20000)
    field[:50] = 400.0
    limit = stats.symmetric_limit(field, 99.0)
    assert np.percentile(np.abs(field), 99) <= limit <= 80.0
    assert stats.nice_ceiling(52.0) == 60.0 and stats.nice_ceiling(0.23) == 0.25
    k = stats.jacobian_limit(np.array([0.4, 1.0, 1.7, 2.2, -0.5]), percentile=100)
    assert k == 3.0  # |log 0.4| = 0.92 > |log 2.2|; exp(0.92) = 2.5 rounds up to 3
    assert stats.jacobian_limit(np.ones(10)) == 1.25


def test_math_text_is_off_for_names():
    from fieldfix.outputs import GroupRow
    from fieldfix.report.figures import figure_png, group_figure

    name = r"$\frac{x^2$ run"  # an unbalanced math expression would make mathtext fail
    common = dict(session="", fieldmap="", status="ok", reason="")
    rows = [GroupRow(subject=name, run="a", max_abs_shift_vox=1.5, **common),
            GroupRow(subject="02", run="b", max_abs_shift_vox=2.0, **common)]
    fig = group_figure(rows, title=name)
    assert figure_png(fig)[:4] == b"\x89PNG"
    assert [t.get_text() for t in fig.axes[0].get_xticklabels()] == [name, "sub-02"]  # sorted labels
    assert group_figure([GroupRow(subject="x", run="r", **common)]) is None


def _plan_rows():
    rows = []
    for thickness in (2.0, 3.0):
        for te in (0.025, 0.035):
            for tilt in (-10.0, 0.0, 10.0):
                for sign in (1, -1):
                    median = 0.9 - 0.05 * thickness - 4.0 * (te - 0.025) - 0.002 * abs(tilt) + 0.01 * sign
                    rows.append(plan_row(protocol=f"{thickness:g} mm {te * 1e3:g} ms {tilt:g} deg {sign}",
                                         thickness_mm=thickness, te_s=te, tilt_deg=tilt, pe_sign=sign,
                                         roi_median=median, tr_s=2.0 + thickness, metric="bold_sensitivity"))
    return rows


def test_tradeoff_figure_has_one_legend_for_all_panels_and_a_label_off_the_points():
    from fieldfix.report.figures import tradeoff_figure

    rows = _plan_rows()
    best = max(rows, key=lambda r: r.roi_median)
    fig = tradeoff_figure(rows, recommended=best, title="$x$ plan")
    fig.canvas.draw()
    legend = [t.get_text() for t in fig.legends[0].get_texts()]
    assert {"2 mm slices", "3 mm slices", "recommended"} <= set(legend)
    ax = fig.axes[2]
    label = next(t for t in ax.texts if t.get_text() == "recommended")
    box = label.get_window_extent(fig.canvas.get_renderer())
    points = ax.transData.transform([(r.tr_s, r.roi_median) for r in rows])
    assert not any(box.contains(x, y) for x, y in points)
    assert [a.get_xlabel() for a in fig.axes[:3]] == ["slice tilt (\u00b0)", "echo time (ms)", "TR (s)"]
    assert fig._suptitle.get_text() == "$x$ plan".replace("$", r"\$")


def test_plan_figure_of_the_planning_job_comes_from_the_report_figures(tmp_path):
    from fieldfix.plan import plot_tradeoffs

    rows = _plan_rows()
    fig = plot_tradeoffs(rows, tmp_path / "plan.png", recommended=rows[3])
    assert (tmp_path / "plan.png").read_bytes()[:4] == b"\x89PNG"
    assert fig.legends and fig.axes[0].get_title(loc="left") == "(a) against slice tilt"


# ---------------------------------------------------------------- discovery


def test_registry_names_never_leave_the_summary_folder(tmp_path):
    from fieldfix.report.sources import Found

    (tmp_path / "a.nii.gz").write_bytes(b"x")
    (tmp_path.parent / "outside.nii.gz").write_bytes(b"x")
    found = Found(tmp_path / "s.json", None)
    assert found.output("a.nii.gz") == tmp_path / "a.nii.gz"
    for name in ("../outside.nii.gz", str(tmp_path.parent / "outside.nii.gz"), ".fieldfix", "", None):
        assert found.output(name) is None


def test_a_file_that_is_no_job_summary_is_refused(tmp_path):
    (tmp_path / "x.json").write_text('{"kind": "something", "format": 1}')
    with pytest.raises(InputError, match="not a fieldfix job summary"):
        rp.build_report([tmp_path / "x.json"], tmp_path / "out")
    with pytest.raises(InputError, match="no fieldfix job summaries"):
        rp.build_report(tmp_path)
    with pytest.raises(InputError):
        rp.build_report(tmp_path / "nope")


# ---------------------------------------------------------------- the page of a real study


class _Page(HTMLParser):
    """Number cells (with the text of their quantity), scripts, sources and plain text."""

    def __init__(self):
        super().__init__()
        self.cells, self.sources, self.scripts, self.units, self.text = [], [], [], [], []
        self._open = None
        self._in_script = False
        self._in_unit = False

    def handle_starttag(self, tag, attrs):
        attrs = dict(attrs)
        if "data-key" in attrs:
            self._open = [attrs["data-key"], attrs["data-value"], attrs["data-format"], attrs["data-scale"], ""]
        if tag == "script":
            self._in_script = True
            self.scripts.append("")
        self._in_unit = attrs.get("class") == "unit"
        for name in ("src", "href"):
            if name in attrs:
                self.sources.append(attrs[name])

    def handle_data(self, data):
        if self._in_script:
            self.scripts[-1] += data
            return
        self.text.append(data)
        if self._open is not None:
            self._open[4] += data
        if self._in_unit:
            self.units.append(data)

    def handle_endtag(self, tag):
        if tag == "script":
            self._in_script = False
        if self._open is not None and tag == "span":
            self.cells.append(tuple(self._open))
            self._open = None
        self._in_unit = False


def _parse(page):
    parser = _Page()
    parser.feed(page.read_text(encoding="utf-8"))
    return parser


@pytest.fixture(scope="module")
def study(tmp_path_factory):
    root = tmp_path_factory.mktemp("report")
    expected = write_outputs(root)
    page = rp.build_report(expected["out"])
    return expected, page, json.loads(page.with_name("report.json").read_text())


def test_build_report_writes_three_files_and_a_typed_record(study):
    expected, page, data = study
    assert page.name == "report.html"
    assert page.with_name("report_summary.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    record = ReportSummary.read(page.with_name("report.json"))
    assert record.html_bytes == page.stat().st_size < rp.MAX_PAGE_BYTES
    assert record.outputs.html == "report.html"
    assert sorted(name.split("/")[-1] for name in record.sources) == sorted(
        ["b0_summary.json", f"{expected['stem']}_unwarp.json", "dropout.json", "plan.json"])


def test_the_page_shows_the_jobs_own_numbers(study):
    expected, _, data = study
    jobs = expected["jobs"]
    run, uw = data["runs"][0], jobs["unwarp"]
    for key in ("max_abs_shift_mm", "max_abs_shift_vox", "percent_shifted_over_1_voxel", "folded_voxels",
                "pe_axis", "pe_code", "coverage_percent"):
        assert run[key] == getattr(uw, key), key
    assert run["timing"] == uw.timing.to_json()
    assert run["max_abs_shift_vox"] == pytest.approx(expected["max_abs_shift_vox"], rel=1e-3)
    fm = data["field_maps"][0]
    assert fm["field_percentiles_hz"] == jobs["fieldmap"].field_percentiles_hz
    assert fm["field_percentiles_hz"]["p50"] == pytest.approx(expected["field_p50_hz"], abs=1e-3)
    assert fm["display_limit_hz"] == stats.symmetric_limit(_field_in_mask(expected), 99.0)
    drop = data["dropout"][0]
    assert drop["retention"] == jobs["dropout"].retention.to_json()  # the job's statistics, in the job's mask
    assert drop["mask"] == "brain_mask.nii.gz"
    assert drop["parameters"] == jobs["dropout"].parameters.to_json()
    plan = data["plans"][0]
    assert plan["recommended"] == jobs["plan"].recommended.to_json()
    assert [r["protocol"] for r in plan["top"]] == [r.protocol for r in jobs["plan"].rows[:8]]
    assert plan["fixed"]["echo_spacing_s"] == 0.0005 and plan["brain_mask"] == "brain_mask.nii.gz"


def _field_in_mask(expected):
    from fieldfix.io import load_image

    out = expected["out"]
    field = load_image(out / "b0_hz.nii.gz").get_fdata(np.float64)
    mask = load_image(out / "b0_mask.nii.gz").get_fdata() > 0.5
    return field[mask]


def test_correction_raises_edge_agreement_most_where_voxels_moved(study):
    _, _, data = study
    run = data["runs"][0]
    assert run["before_view"] is True
    assert run["shifted_region_voxels"] >= 50
    gain_moved = run["edge_agreement_shifted_after"] - run["edge_agreement_shifted_before"]
    gain_whole = run["edge_agreement_after"] - run["edge_agreement_before"]
    assert gain_moved > gain_whole > 0.02
    assert run["slices_worse_mm"] == []
    first = data["headline"][0]
    assert first["kind"] == "edges_moved" and first["change"] == pytest.approx(gain_moved, abs=1e-6)
    assert [m["kind"] for m in data["headline"]] == ["edges_moved", "edges_whole"]
    assert not {"edges_worse", "edges_unchanged"} & {w["code"] for w in data["warnings"]}


def test_page_numbers_equal_report_json_and_carry_units(study):
    _, page, data = study
    parsed = _parse(page)
    assert len(parsed.cells) >= 60
    for key, value_text, fmt, scale, shown in parsed.cells:
        value = rp.lookup(data, key)
        assert json.loads(value_text) == value, key
        assert shown == rp.format_number(value, fmt, float(scale)), key
    text = page.read_text(encoding="utf-8")
    # every number outside a table whose header carries the unit has a unit beside it
    for match in re.finditer(r'<span class="quantity">(.*?)</span></span>', text):
        assert re.search(r'class="unit">[^<]+<', match.group(0) + "</span>"), match.group(0)
    keys = {c[0] for c in parsed.cells}
    for needed in ("runs.0.max_abs_shift_mm", "runs.0.timing.readout_time_s", "field_maps.0.unaliased_range_hz",
                   "field_maps.0.echo_times_s", "dropout.0.parameters.te_s", "dropout.0.retention.median",
                   "headline.0.before", "headline.0.after", "headline.0.change", "plans.0.top.0.te_s"):
        assert needed in keys, needed
    # values written the way a physicist reads them
    assert "\u00b1" in next(c[4] for c in parsed.cells if c[0] == "field_maps.0.unaliased_range_hz")
    assert next(c[4] for c in parsed.cells if c[0] == "field_maps.0.echo_times_s") == "4.92, 7.38"
    assert "Timing: " not in text and "zshim_mtms_per_m<" not in text and "te_ms" not in text


def test_page_is_self_contained_and_allows_only_its_own_script(study):
    _, page, data = study
    text = page.read_text(encoding="utf-8")
    parsed = _parse(page)
    assert parsed.sources and all(s.startswith(("data:", "#")) for s in parsed.sources)
    assert "http://" not in text and "https://" not in text and "@import" not in text
    policy = html.unescape(re.search(r'http-equiv="Content-Security-Policy" content="([^"]+)"', text).group(1))
    assert "unsafe-inline" not in policy and "unsafe-eval" not in policy
    assert len(parsed.scripts) == 1
    digest = base64.b64encode(hashlib.sha256(parsed.scripts[0].encode("utf-8")).digest()).decode()
    assert f"script-src 'sha256-{digest}'" in policy
    assert rp.CAUTION in text and text.count(rp.CAUTION) >= 2
    # the four questions first, then one section per question in the same order
    order = [text.index(f'id="{name}"') for name in ("glance", "q-field", "q-correction", "q-loss", "q-suspicious")]
    assert order == sorted(order)
    assert "Edge agreement: normalised gradient fields" in text


def test_dropout_section_states_its_protocol_and_mask(study):
    _, page, _ = study
    text = page.read_text(encoding="utf-8")
    section = text[text.index('id="q-loss"'):text.index('id="q-suspicious"')]
    for words in ("Echo time", "Slice thickness", "Slice tilt", "statistics inside the mask the job used: "
                  "brain_mask.nii.gz", "Held fixed across the protocols", "Echo time<br>"):
        assert words in section, words


def test_figure_for_papers_shows_a_retention_slice_where_signal_is_lost(study):
    from fieldfix.io import load_image
    from fieldfix.report.measure import measure_dropout
    from fieldfix.report.render import paper_panels
    from fieldfix.report.sources import gather

    expected, _, _ = study
    sources = gather(expected["out"])
    _, view = measure_dropout(sources.dropout[0])
    panel = paper_panels([], [], [view])[-1]
    values = panel.volume[:, :, panel.k]
    inside = view.mask[:, :, panel.k]
    assert np.any(values[inside] < view.threshold)
    retention = load_image(expected["out"] / "retention.nii.gz").get_fdata()
    assert view.mask.sum() == expected["jobs"]["dropout"].retention.voxels == int((retention != 0).sum())


def test_refuses_to_overwrite_or_replace_a_foreign_file(study, tmp_path):
    expected, page, _ = study
    with pytest.raises(OutputError):
        rp.build_report(expected["out"])
    out = rp.build_report(expected["out"], tmp_path / "qc" / "sub-01.html", title="Sub 01")
    assert out == tmp_path / "qc" / "sub-01.html"
    assert (tmp_path / "qc" / "sub-01_summary.png").is_file()
    assert ReportSummary.read(tmp_path / "qc" / "sub-01.json").title == "Sub 01"
    rp.build_report(expected["out"], tmp_path / "qc" / "sub-01.html", overwrite=True)
    (tmp_path / "mine").mkdir()
    (tmp_path / "mine" / "report.html").write_text("my notes")
    with pytest.raises(OutputError, match="did not write"):
        rp.build_report(expected["out"], tmp_path / "mine", overwrite=True)
    assert (tmp_path / "mine" / "report.html").read_text() == "my notes"


def test_the_distorted_run_is_read_only_when_the_ledger_vouches_for_the_summary(study, tmp_path):
    from fieldfix.jsonfile import write_json
    from fieldfix.outdir import output_folder

    expected, _, _ = study
    copy = tmp_path / "copy"
    shutil.copytree(expected["out"], copy, ignore=shutil.ignore_patterns(".fieldfix", "report*"))
    data = json.loads(rp.build_report(copy).with_name("report.json").read_text())
    run = data["runs"][0]
    assert run["before_view"] is False and run["edge_agreement_before"] is None
    assert any("not vouched for" in n for n in run["notes"])
    # a summary fieldfix wrote, naming a file that is no NIfTI image
    (tmp_path / "notes.txt").write_text("not an image")
    edited = tmp_path / "edited"
    shutil.copytree(expected["out"], edited, ignore=shutil.ignore_patterns(".fieldfix", "report*"))
    name = edited / f"{expected['stem']}_unwarp.json"
    summary = UnwarpSummary.read(name)
    name.unlink()
    with output_folder(edited):
        write_json(name, {**summary.to_json(), "run": str(tmp_path / "notes.txt")})
        data = json.loads(rp.build_report(edited).with_name("report.json").read_text())
    assert any("not a readable NIfTI" in n for n in data["runs"][0]["notes"])
    assert data["runs"][0]["before_view"] is False


def test_wrong_polarity_is_flagged(tmp_path):
    # A correction applied with the wrong sign doubles the distortion: the edge agreement
    # where voxels moved must fall and the page must say so.
    expected = write_outputs(tmp_path, wrong_polarity=True, with_dropout=False, with_plan=False)
    page = rp.build_report(expected["out"])
    data = json.loads(page.with_name("report.json").read_text())
    run = data["runs"][0]
    assert run["edge_agreement_shifted_after"] < run["edge_agreement_shifted_before"] - 0.05
    assert "edges_worse" in {w["code"] for w in data["warnings"]}
    assert 'data-code="edges_worse"' in page.read_text(encoding="utf-8")
    assert 'class="tile state-bad" id="tile-correction"' in page.read_text(encoding="utf-8")


def test_phase_encoding_along_the_first_voxel_axis(tmp_path):
    # The same head stored with its first two axes swapped: phase encoding along i. The
    # report takes the axis from the unwarping summary, so its moved region runs along i.
    from fieldfix.io import load_image

    expected = write_outputs(tmp_path, pe_first=True, with_dropout=False, with_plan=False)
    data = json.loads(rp.build_report(expected["out"]).with_name("report.json").read_text())
    run = data["runs"][0]
    assert run["pe_axis"] == 0 and run["pe_code"] == "i-"
    out = expected["out"]
    shift = load_image(out / f"{expected['stem']}_shift_vox.nii.gz").get_fdata()
    mask = load_image(out / "b0_mask.nii.gz").get_fdata() > 0.5
    assert run["shifted_region_voxels"] == int(rp.moved_region(shift, 0, mask).sum())
    assert run["shifted_region_voxels"] != int(rp.moved_region(shift, 1, mask).sum())
    assert run["edge_agreement_shifted_after"] > run["edge_agreement_shifted_before"] + 0.05


def test_explicit_summaries_of_two_subjects_make_one_page(tmp_path):
    first = write_outputs(tmp_path / "a", with_plan=False, stem="sub-01_task-rest_bold", out_name="sub-01")
    second = write_outputs(tmp_path / "b", with_plan=False, peak_hz=150.0, stem="sub-02_task-rest_bold",
                           out_name="sub-02")
    paths = [e["out"] / name for e in (first, second)
             for name in ("b0_summary.json", f"{e['stem']}_unwarp.json", "dropout.json")]
    page = rp.build_report(paths, tmp_path / "group" / "report.html", title="two subjects")
    data = json.loads(page.with_name("report.json").read_text())
    assert [r["subject"] for r in data["runs"]] == ["sub-01", "sub-02"]
    assert [r["field_map"] for r in data["runs"]] == ["b0_summary.json", "b0_summary.json"]
    assert data["origin"] == str(tmp_path)  # where the summaries are; no gathering folder
    text = page.read_text(encoding="utf-8")
    assert 'id="overview"' in text and 'id="group"' in text
    assert sum(m["kind"] == "edges_moved" for m in data["headline"]) == 2


def test_a_run_whose_field_map_is_not_read_gets_no_edge_numbers_and_says_why(tmp_path):
    expected = write_outputs(tmp_path, with_fieldmap=False, with_dropout=False, with_plan=False)
    data = json.loads(rp.build_report(expected["out"]).with_name("report.json").read_text())
    run = data["runs"][0]
    assert data["field_maps"] == [] and run["edge_agreement_after"] is None and run["field_map"] is None
    assert any("not among the summaries read" in n for n in run["notes"])
    both = [expected["out"] / f"{expected['stem']}_unwarp.json", expected["fieldmap_out"] / "b0_summary.json"]
    data = json.loads(rp.build_report(both, tmp_path / "qc").with_name("report.json").read_text())
    assert data["runs"][0]["field_map"] == "b0_summary.json"
    assert data["runs"][0]["edge_agreement_shifted_after"] > data["runs"][0]["edge_agreement_shifted_before"]


def test_headline_shows_truth_and_polarities_when_they_exist(study, tmp_path):
    from types import SimpleNamespace

    from fieldfix.report.headline import polarity_measures

    expected, _, _ = study
    truth = DemoChecks(b0_error_vs_truth_median_hz=0.9, shift_error_vs_truth_median_vox=0.03,
                       edge_agreement_shifted_before=0.44, edge_agreement_shifted_after=0.46)
    data = json.loads(rp.build_report(expected["out"], tmp_path, truth=truth).with_name("report.json").read_text())
    kinds = [m["kind"] for m in data["headline"]]
    assert kinds == ["edges_moved", "truth_edges_moved", "truth_shift_error", "edges_whole", "truth_b0_error"]
    assert data["headline"][1]["change"] == pytest.approx(0.02)
    assert data["headline"][2]["after"] == 0.03 and data["headline"][2]["unit"] == "voxels"
    pair = polarity_measures("run", SimpleNamespace(nrmsd_before=0.31, nrmsd_after=0.08))[0]
    assert pair.kind == "polarities" and not pair.higher_is_better and pair.change == pytest.approx(-0.23)


def test_pictures_are_drawn_again_at_lower_resolution_but_measured_once(study, tmp_path, monkeypatch):
    from fieldfix.report import build

    expected, _, _ = study
    calls = []
    measure = build.measure_run
    monkeypatch.setattr(build, "measure_run", lambda *a, **k: calls.append(1) or measure(*a, **k))
    monkeypatch.setattr(build, "MAX_PAGE_BYTES", 1)
    monkeypatch.setattr(build, "RESOLUTIONS_DPI", (80, 40))
    data = json.loads(build.build_report(expected["out"], tmp_path).with_name("report.json").read_text())
    assert calls == [1] and data["figure_dpi"] == build.RESOLUTIONS_DPI[-1]


def test_plan_alone_makes_a_page_whose_figure_is_the_tradeoffs(study, tmp_path):
    expected, _, _ = study
    page = rp.build_report([expected["out"] / "plan.json"], tmp_path)
    text = page.read_text(encoding="utf-8")
    assert 'id="q-loss"' in text and 'id="q-correction"' not in text
    assert page.with_name("report_summary.png").read_bytes()[:4] == b"\x89PNG"


# ---------------------------------------------------------------- command line


def _script():
    import sys
    from pathlib import Path

    return shutil.which("fieldfix", path=str(Path(sys.executable).parent)) or shutil.which("fieldfix")


@pytest.mark.slow
def test_cli_report_through_the_console_script(study, tmp_path):
    import subprocess

    expected, _, _ = study
    script = _script()
    assert script, "the fieldfix console script is not installed"
    result = subprocess.run([script, "report", str(expected["out"]), "--out", str(tmp_path / "qc"), "--json"],
                            capture_output=True, text=True, timeout=120)
    assert result.returncode == 0, result.stderr
    summary = json.loads(result.stdout)
    assert summary["report"] == str(tmp_path / "qc" / "report.html")
    assert any("echo" in w for w in summary["warnings"])
    again = subprocess.run([script, "report", str(expected["out"]), "--out", str(tmp_path / "qc")],
                           capture_output=True, text=True, timeout=120)
    assert again.returncode == 2 and "overwrite" in again.stderr
    files = [str(expected["out"] / "b0_summary.json"), str(expected["out"] / "dropout.json")]
    listed = subprocess.run([script, "report", *files, "--out", str(tmp_path / "two.html"), "--json"],
                            capture_output=True, text=True, timeout=120)
    assert listed.returncode == 0, listed.stderr
    assert len(ReportSummary.read(tmp_path / "two.json").sources) == 2
    missing = subprocess.run([script, "report", str(tmp_path / "absent")], capture_output=True, text=True, timeout=60)
    assert missing.returncode == 2 and len(missing.stderr.strip().splitlines()) == 1


def test_unwarp_report_includes_the_field_map_kept_beside_the_b0_map(study, tmp_path):
    import subprocess

    expected, _, _ = study
    run = expected["paths"]["run"]
    b0 = expected["out"] / "b0_hz.nii.gz"
    result = subprocess.run([_script(), "unwarp", str(run), "--b0", str(b0), "--out", str(tmp_path / "u"), "--json"],
                            capture_output=True, text=True, timeout=180)
    assert result.returncode == 0, result.stderr
    data = json.loads((tmp_path / "u" / "report.json").read_text())
    assert data["runs"][0]["field_map"] == "b0_summary.json" and data["field_maps"]
    assert data["runs"][0]["before_view"] is True


def test_every_planner_parameter_is_on_the_page_as_swept_or_held_fixed():
    # A new SweepSpec knob fails here until the page has a label for it, instead of being
    # left out of the "held fixed" table without a word.
    from fieldfix.plan import SWEEP_AXES, SweepSpec
    from fieldfix.report.view import PLAN_FIXED

    parameters = set(SweepSpec().as_dict())
    assert parameters - set(SWEEP_AXES) == set(PLAN_FIXED)
    assert set(SWEEP_AXES) <= parameters
