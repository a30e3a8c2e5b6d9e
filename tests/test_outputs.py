"""The typed contract between layers (fieldfix.outputs, fieldfix.records).

* Every job's summary, as written to disk, reads back as the same typed record; the files a
  job writes are exactly those its registry entry names (plus provenance sidecars).
* A summary whose keys do not match its record is refused naming the file and the key: a
  key renamed on one side only is caught here, not by a reader guessing.
"""

from __future__ import annotations

import dataclasses
import json
from pathlib import Path

import numpy as np
import pytest

from fieldfix.errors import InputError
from fieldfix.outputs import (
    DropoutFiles,
    DropoutSummary,
    FieldMapFiles,
    FieldMapSummary,
    JobOptions,
    PlanSummary,
    UnwarpFiles,
    UnwarpSummary,
    find_summaries,
    job_and_settings,
)
from fieldfix.records import SummaryError
from test_bad_input import make_b0, make_magnitude, make_phasediff, make_run


@pytest.fixture(scope="module")
def all_jobs(tmp_path_factory):
    """Field map, unwarping, dropout and plan run once into one folder."""
    from fieldfix.workflows.dropout import run_dropout
    from fieldfix.workflows.fieldmap import run_fieldmap
    from fieldfix.workflows.plan import run_plan
    from fieldfix.workflows.unwarp import run_unwarp

    folder = tmp_path_factory.mktemp("jobs")
    inputs = folder / "in"
    out = folder / "out"
    pd, mag = make_phasediff(inputs), make_magnitude(inputs)
    run = make_run(inputs)
    fm = run_fieldmap(out, phase_diff=pd, magnitude=[mag], field_strength_t=3.0, also_units=["ppm"])
    (uw,) = run_unwarp([run], out / fm.outputs.b0_hz, out)
    dr = run_dropout(out / fm.outputs.b0_hz, out, te_s=0.03, thickness_mm=3.0, like=run)
    pl = run_plan(out / fm.outputs.b0_hz, out, roi_path=out / fm.outputs.mask, te_s=[0.03], thickness_mm=[2.0, 3.0])
    return out, {"fieldmap": fm, "unwarp": uw, "dropout": dr, "plan": pl}


def test_each_summary_on_disk_reads_back_as_the_returned_record(all_jobs):
    out, jobs = all_jobs
    assert FieldMapSummary.read(out / jobs["fieldmap"].outputs.summary) == jobs["fieldmap"]
    assert UnwarpSummary.read(out / jobs["unwarp"].outputs.summary) == jobs["unwarp"]
    assert DropoutSummary.read(out / jobs["dropout"].outputs.summary) == jobs["dropout"]
    assert PlanSummary.read(out / jobs["plan"].outputs.json) == jobs["plan"]
    found = find_summaries(out)
    assert [s for _, s in found.field_maps] == [jobs["fieldmap"]]
    assert [s for _, s in found.runs] == [jobs["unwarp"]]
    assert [s for _, s in found.dropout] == [jobs["dropout"]]
    assert [s for _, s in found.plans] == [jobs["plan"]]


def test_the_registry_names_every_file_a_job_writes(all_jobs):
    out, jobs = all_jobs
    named = set()
    for summary in jobs.values():
        named |= {p.name for p in summary.outputs.guarded(out)}
    on_disk = {p.name for p in out.iterdir() if p.is_file()}
    assert on_disk == named
    assert jobs["fieldmap"].outputs == FieldMapFiles.named(also_units=["ppm"])
    assert jobs["unwarp"].outputs == UnwarpFiles.named("sub-01_task-rest_bold")
    assert jobs["dropout"].outputs == DropoutFiles.named(bold=True, on_epi=False)


def test_a_renamed_or_missing_key_is_refused_naming_file_and_key(all_jobs, tmp_path):
    out, jobs = all_jobs
    data = json.loads((out / jobs["unwarp"].outputs.summary).read_text())
    cases = {
        "renamed": ({k if k != "max_abs_shift_vox" else "max_shift_vox": v for k, v in data.items()},
                    "max_shift_vox"),
        "missing": ({k: v for k, v in data.items() if k != "pe_axis"}, "pe_axis"),
        "wrong type": (dict(data, n_volumes="three"), "n_volumes"),
        "nested": (dict(data, timing=dict(data["timing"], spacing_s=1.0)), "spacing_s"),
        "wrong kind": (dict(data, kind="dropout"), "dropout"),
    }
    for name, (bad, key) in cases.items():
        path = tmp_path / f"{name.replace(' ', '_')}_unwarp.json"
        path.write_text(json.dumps(bad))
        with pytest.raises(SummaryError) as info:
            UnwarpSummary.read(path)
        assert str(path) in str(info.value) and key in str(info.value), name
        assert isinstance(info.value, InputError)


def test_a_plan_row_with_a_renamed_key_is_refused(all_jobs, tmp_path):
    # The table's rows are typed as well: a row key renamed by a writer is an error, not a
    # column that silently disappears from the report's trade-off figure.
    out, jobs = all_jobs
    data = json.loads((out / jobs["plan"].outputs.json).read_text())
    assert set(data["rows"][0]) >= set(data["columns"])  # every CSV column is a row field
    row = {("echo_time_s" if k == "te_s" else k): v for k, v in data["rows"][1].items()}
    path = tmp_path / "renamed_plan.json"
    path.write_text(json.dumps(dict(data, rows=[data["rows"][0], row])))
    with pytest.raises(SummaryError) as info:
        PlanSummary.read(path)
    assert str(path) in str(info.value) and "rows[1]" in str(info.value) and "echo_time_s" in str(info.value)


def test_one_name_per_quantity_across_records():
    """The share of voxels under the threshold has one name in every record that reports it."""
    from fieldfix.outputs import DemoChecks, MapStatistics

    fields = {f for cls in (MapStatistics, DemoChecks) for f in cls.__dataclass_fields__}
    assert "percent_below_threshold" in fields
    assert not [f for f in fields if "pct_below" in f or f.endswith("_percent_below_half")]


def test_a_quantity_has_one_unit_across_records_unless_reported_in_several():
    """A stem with two unit suffixes (``te_s`` beside ``te_ms``) is one quantity with two names;
    only the quantities fieldfix reports in several units on purpose may have them."""
    import collections

    import fieldfix.batch.params  # noqa: F401  (records of these modules join the census)
    import fieldfix.batch.tasks  # noqa: F401
    import fieldfix.scenario_spec  # noqa: F401
    from fieldfix.records import Record

    def subclasses(cls):
        for sub in cls.__subclasses__():
            yield sub
            yield from subclasses(sub)

    units = ("_s", "_ms", "_mm", "_hz", "_deg", "_rad", "_t", "_ppm", "_vox", "_percent")
    seen = collections.defaultdict(set)
    records = set(subclasses(Record))
    assert len(records) > 40
    for cls in records:
        for f in dataclasses.fields(cls):
            for unit in units:
                if f.name.endswith(unit):
                    seen[f.name[: -len(unit)]].add(unit)
    several = {stem for stem, found in seen.items() if len(found) > 1}
    # B0 maps and their percentiles in Hz and ppm, shifts in voxels and mm; coverage_mm (a slab's
    # extent) and coverage_percent (a share of voxels) are two quantities.
    assert several <= {"b0", "field_percentiles", "max_abs_shift", "coverage"}, several


def test_job_options_route_keywords_and_refuse_unknown_ones(tmp_path):
    from fieldfix.workflows.unwarp import UnwarpSettings

    job, settings = job_and_settings(tmp_path, UnwarpSettings, None, {"tag": "s1_", "pe_code": "j-"})
    assert job == JobOptions(out_dir=tmp_path, tag="s1_") and settings.pe_code == "j-"
    with pytest.raises(TypeError, match="prefix"):
        job_and_settings(tmp_path, UnwarpSettings, None, {"prefix": "s1_"})
    with pytest.raises(Exception, match="no folders"):
        JobOptions(out_dir=tmp_path, tag="../x")


def test_numbers_written_as_numpy_values_read_back_as_plain_numbers(tmp_path):
    from fieldfix.jsonfile import write_json
    from fieldfix.outputs import MapStatistics

    record = MapStatistics(median=np.float32(0.5).item(), percent_below_threshold=12.0, voxels=3)
    write_json(tmp_path / "m.json", record.to_json())
    assert MapStatistics.read(tmp_path / "m.json") == record
    assert Path(tmp_path / "m.json").read_text().count("\n") > 1


def test_the_report_carries_each_jobs_numbers_as_the_job_wrote_them(all_jobs, tmp_path):
    """Each report entry extends its job's shared numbers (one definition); the values in report.json are
    the job summary's own, apart from mask paths, which the page shows by name."""
    from fieldfix.outputs import (DropoutNumbers, FieldMapNumbers, PlanNumbers, ReportSummary, ShiftNumbers)
    from fieldfix.records import fields_of
    from fieldfix.report import build_report

    out, jobs = all_jobs
    page = build_report(out, tmp_path / "qc" / "report.html")
    report = ReportSummary.read(page.with_suffix(".json"))
    entries = {"fieldmap": (report.field_maps, FieldMapNumbers), "unwarp": (report.runs, ShiftNumbers),
               "dropout": (report.dropout, DropoutNumbers), "plan": (report.plans, PlanNumbers)}
    for kind, (items, part) in entries.items():
        assert len(items) == 1, kind
        shown, written = fields_of(items[0], part), fields_of(jobs[kind], part)
        assert set(shown) == set(written) and len(shown) >= 6, kind
        for name in shown:
            if name in ("mask", "roi", "brain_mask"):
                assert shown[name] == Path(written[name]).name, (kind, name)
            else:
                assert shown[name] == written[name], (kind, name)
    with pytest.raises(TypeError, match="is not a ShiftNumbers"):
        fields_of(jobs["plan"], ShiftNumbers)
