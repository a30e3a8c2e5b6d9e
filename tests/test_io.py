"""NIfTI round trips through nibabel, sidecars, provenance and atomic writes."""

import gzip
import os
import hashlib
import json
import signal
import subprocess
import sys
import textwrap

import nibabel as nib
import numpy as np
import pytest

import fieldfix.io

from fieldfix.errors import InputError, OutputError
from fieldfix.io import (
    NIFTI_INTENT_DISPVECT,
    Provenance,
    StreamingWriter,
    image_stem,
    load_image,
    output_paths_guard,
    read_sidecar,
    save_image,
    sidecar_path,
    write_json,
)


def _affine():
    affine = np.diag([2.0, 2.5, 3.0, 1.0])
    affine[:3, 3] = [-20, -30, -10]
    return affine


@pytest.mark.parametrize("klass", [nib.Nifti1Image, nib.Nifti2Image])
@pytest.mark.parametrize("suffix", [".nii", ".nii.gz"])
def test_load_keeps_affine_dtype_zooms_tr_and_scaling(tmp_path, klass, suffix):
    data = np.arange(5 * 6 * 4 * 3, dtype=np.int16).reshape(5, 6, 4, 3)
    image = klass(data, _affine())
    image.header.set_zooms((2.0, 2.5, 3.0, 1.8))
    image.header.set_xyzt_units("mm", "sec")
    image.header.set_slope_inter(0.5, 10.0)
    path = tmp_path / f"run{suffix}"
    nib.save(image, path)
    loaded = load_image(path)
    assert loaded.shape == (5, 6, 4, 3)
    assert np.allclose(loaded.affine, _affine())
    assert loaded.zooms[:3] == (2.0, 2.5, 3.0)
    assert loaded.tr_s == pytest.approx(1.8)
    assert loaded.header.get_data_dtype() == np.int16
    # Scaling is applied on read, like nibabel's own get_fdata (external reference).
    expected = nib.load(path).get_fdata()
    assert np.allclose(loaded.get_fdata(np.float64), expected)
    assert np.allclose(loaded.volume(2), expected[..., 2])
    assert expected[1, 0, 0, 0] == pytest.approx(0.5 * data[1, 0, 0, 0] + 10)


def test_tr_in_milliseconds_and_from_sidecar(tmp_path):
    image = nib.Nifti1Image(np.zeros((2, 2, 2, 2), np.float32), np.eye(4))
    image.header.set_zooms((1, 1, 1, 2000.0))
    image.header.set_xyzt_units("mm", "msec")
    nib.save(image, tmp_path / "a.nii.gz")
    assert load_image(tmp_path / "a.nii.gz").tr_s == pytest.approx(2.0)
    (tmp_path / "a.json").write_text(json.dumps({"RepetitionTime": 1.5, "PhaseEncodingDirection": "j-"}))
    loaded = load_image(tmp_path / "a.nii.gz")
    assert loaded.tr_s == 1.5 and loaded.sidecar["PhaseEncodingDirection"] == "j-"


@pytest.mark.parametrize("dtype", [np.float32, np.float64, np.int16, np.uint8])
def test_save_round_trip(tmp_path, dtype):
    data = (np.random.default_rng(0).random((6, 5, 4)) * 100).astype(dtype)
    path = save_image(tmp_path / "out.nii.gz", data, _affine(), dtype=dtype)
    back = nib.load(path)
    assert back.get_data_dtype() == dtype
    assert np.array_equal(np.asanyarray(back.dataobj), data)
    assert np.allclose(back.affine, _affine())
    assert back.header["sform_code"] == 1 and back.header["qform_code"] == 1


def test_save_keeps_template_tr_and_flavour(tmp_path):
    template = nib.Nifti2Image(np.zeros((3, 3, 3, 4), np.float32), _affine())
    template.header.set_zooms((2.0, 2.5, 3.0, 2.2))
    nib.save(template, tmp_path / "t.nii")
    loaded = load_image(tmp_path / "t.nii")
    out = save_image(tmp_path / "o.nii.gz", np.ones((3, 3, 3, 4)), loaded.affine, template=loaded)
    back = nib.load(out)
    assert isinstance(back, nib.Nifti2Image)
    assert back.header.get_zooms()[3] == pytest.approx(2.2)


def test_displacement_intent_and_bool_masks(tmp_path):
    field = np.zeros((3, 3, 3, 1, 3), np.float32)
    out = save_image(tmp_path / "disp.nii.gz", field, np.eye(4), intent=NIFTI_INTENT_DISPVECT)
    assert nib.load(out).header.get_intent()[0] == "vector" or nib.load(out).header["intent_code"] == 1006
    mask = save_image(tmp_path / "mask.nii.gz", np.ones((2, 2, 2), bool), np.eye(4))
    assert nib.load(mask).get_data_dtype() == np.uint8


def test_provenance_sidecar_records_inputs_and_hashes(tmp_path):
    source = tmp_path / "in.nii.gz"
    nib.save(nib.Nifti1Image(np.ones((2, 2, 2), np.float32), np.eye(4)), source)
    prov = Provenance("fieldfix test --x 1", {"readout_time_s": 0.0456}, [source])
    out = save_image(tmp_path / "out" / "b0_hz.nii.gz", np.zeros((2, 2, 2)), np.eye(4), inputs=[source],
                     provenance=prov, sidecar_extra={"Units": "Hz"})
    record = json.loads(sidecar_path(out).read_text())
    assert record["Command"] == "fieldfix test --x 1"
    assert record["Parameters"] == {"readout_time_s": 0.0456}
    assert record["Inputs"][0]["sha256"] == hashlib.sha256(source.read_bytes()).hexdigest()
    assert record["GeneratedBy"]["Name"] == "fieldfix" and record["Units"] == "Hz"
    assert "not a medical device" in record["Caution"]
    assert read_sidecar(out)["Units"] == "Hz"


def test_inputs_are_never_overwritten(tmp_path):
    source = tmp_path / "b0_hz.nii.gz"
    nib.save(nib.Nifti1Image(np.ones((2, 2, 2), np.float32), np.eye(4)), source)
    before = source.read_bytes()
    for overwrite in (False, True):
        with pytest.raises(OutputError, match="inputs are never overwritten"):
            save_image(source, np.zeros((2, 2, 2)), np.eye(4), inputs=[source], overwrite=overwrite)
    assert source.read_bytes() == before
    assert sorted(p.name for p in tmp_path.iterdir()) == ["b0_hz.nii.gz"]


def test_existing_output_needs_overwrite(tmp_path):
    path = tmp_path / "x.json"
    write_json(path, {"a": 1})
    with pytest.raises(OutputError, match="output exists"):
        write_json(path, {"a": 2})
    write_json(path, {"a": np.float32(2.5), "b": float("nan"), "c": np.arange(2)}, overwrite=True)
    assert json.loads(path.read_text()) == {"a": 2.5, "b": None, "c": [0, 1]}


def test_guard_checks_all_paths_before_anything_is_written(tmp_path):
    (tmp_path / "b.nii.gz").write_bytes(b"x")
    with pytest.raises(OutputError) as info:
        output_paths_guard([tmp_path / "a.nii.gz", tmp_path / "b.nii.gz"], [])
    assert "b.nii.gz" in str(info.value)


def test_failed_write_leaves_nothing(tmp_path, monkeypatch):
    def broken_save(image, filename, *effort):
        with open(filename, "wb") as handle:
            handle.write(b"partial")
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(fieldfix.io, "_write_nifti", broken_save)
    with pytest.raises(OutputError, match="No space left on device"):
        save_image(tmp_path / "b0_hz.nii.gz", np.zeros((2, 2, 2)), np.eye(4))
    assert list(tmp_path.iterdir()) == []


def test_streaming_writer_equals_nibabel_save(tmp_path):
    rng = np.random.default_rng(3)
    data = rng.normal(size=(7, 6, 5, 9)).astype(np.float32)
    template = nib.Nifti1Image(data, _affine())
    template.header.set_zooms((2.0, 2.5, 3.0, 1.25))
    nib.save(template, tmp_path / "in.nii.gz")
    source = load_image(tmp_path / "in.nii.gz")
    for suffix in (".nii.gz", ".nii"):
        target = tmp_path / f"streamed{suffix}"
        with StreamingWriter(target, data.shape, source.affine, template=source) as writer:
            for t in range(data.shape[3]):
                writer.write(source.volume(t))
        back = nib.load(target)
        assert np.array_equal(back.get_fdata(dtype=np.float32), data)
        assert np.allclose(back.affine, _affine())
        assert back.header.get_zooms()[3] == pytest.approx(1.25)
    with gzip.open(tmp_path / "streamed.nii.gz") as handle:
        assert len(handle.read()) == 352 + data.nbytes


def test_streaming_writer_removes_partial_output_on_error(tmp_path):
    target = tmp_path / "run.nii.gz"
    with pytest.raises(KeyboardInterrupt):
        with StreamingWriter(target, (2, 2, 2, 4), np.eye(4)) as writer:
            writer.write(np.zeros((2, 2, 2)))
            raise KeyboardInterrupt
    assert list(tmp_path.iterdir()) == []
    with pytest.raises(OutputError, match="only 1 of 4 volumes"):
        with StreamingWriter(target, (2, 2, 2, 4), np.eye(4)) as writer:
            writer.write(np.zeros((2, 2, 2)))
    assert list(tmp_path.iterdir()) == []


def test_sigterm_during_streamed_write_leaves_no_file(tmp_path):
    # A real process killed with SIGTERM while writing: the frame's handler turns SIGTERM into
    # KeyboardInterrupt, and the writer removes its temporary file.
    script = textwrap.dedent(f"""
        import signal, sys, time, numpy as np
        from fieldfix.io import StreamingWriter
        def stop(signum, frame):
            raise KeyboardInterrupt
        signal.signal(signal.SIGTERM, stop)
        try:
            with StreamingWriter({str(tmp_path / 'run.nii.gz')!r}, (8, 8, 8, 1000), np.eye(4)) as writer:
                for t in range(1000):
                    writer.write(np.zeros((8, 8, 8)))
                    if t == 2:
                        print("writing", flush=True)
                    time.sleep(0.01)
        except KeyboardInterrupt:
            sys.exit(130)
    """)
    proc = subprocess.Popen([sys.executable, "-c", script], stdout=subprocess.PIPE, text=True)
    assert proc.stdout.readline().strip() == "writing"
    proc.send_signal(signal.SIGTERM)
    assert proc.wait(timeout=30) == 130
    assert list(tmp_path.iterdir()) == []


@pytest.mark.parametrize("content", [b"", b"not an image at all", b"\x1f\x8b\x08\x00garbage"])
def test_not_nifti_is_a_clear_error(tmp_path, content):
    path = tmp_path / "bad.nii.gz"
    path.write_bytes(content)
    with pytest.raises(InputError) as info:
        load_image(path).get_fdata()
    assert str(path) in str(info.value)


def test_truncated_gzip_is_a_clear_error(tmp_path):
    path = tmp_path / "cut.nii.gz"
    nib.save(nib.Nifti1Image(np.random.default_rng(0).random((20, 20, 20)).astype(np.float32), np.eye(4)), path)
    raw = path.read_bytes()
    path.write_bytes(raw[: len(raw) // 2])
    with pytest.raises(InputError, match="truncated or corrupt"):
        load_image(path).get_fdata()


def test_missing_and_wrong_dimensions(tmp_path):
    with pytest.raises(InputError, match="file not found"):
        load_image(tmp_path / "nope.nii.gz")
    nib.save(nib.Nifti1Image(np.zeros((3, 3), np.float32), np.eye(4)), tmp_path / "flat.nii")
    with pytest.raises(InputError, match="2D"):
        load_image(tmp_path / "flat.nii", ndim=(3, 4))
    nib.save(nib.Nifti1Image(np.zeros((3, 3, 3, 1), np.float32), np.eye(4)), tmp_path / "one.nii")
    assert load_image(tmp_path / "one.nii", ndim=(3,)).shape == (3, 3, 3)


def test_bad_sidecar_is_named(tmp_path):
    nib.save(nib.Nifti1Image(np.zeros((2, 2, 2), np.float32), np.eye(4)), tmp_path / "a.nii.gz")
    (tmp_path / "a.json").write_text("{not json")
    with pytest.raises(InputError) as info:
        load_image(tmp_path / "a.nii.gz")
    assert "a.json" in str(info.value) and "not valid JSON" in str(info.value)


def test_image_stem():
    assert image_stem("x/sub-01_bold.nii.gz") == "sub-01_bold"
    assert image_stem("a.nii") == "a"


def test_volumes_stream_through_one_open_file(tmp_path, monkeypatch):
    # Reading a .nii.gz run volume by volume must continue one open stream, not reopen and
    # decompress from the start for every volume: nibabel's openers may only wrap the one
    # gzip stream the image was opened with, never a file name.
    import nibabel.openers

    data = np.random.default_rng(1).random((6, 5, 4, 7)).astype(np.float32)
    nib.save(nib.Nifti1Image(data, np.eye(4)), tmp_path / "run.nii.gz")
    image = load_image(tmp_path / "run.nii.gz")
    opened = []
    original = nibabel.openers.Opener.__init__

    def counting(self, *args, **kwargs):
        opened.append(args[0] if args else None)
        original(self, *args, **kwargs)

    monkeypatch.setattr(nibabel.openers.Opener, "__init__", counting)
    volumes = [image.volume(t) for t in range(7)]
    assert np.array_equal(np.stack(volumes, axis=-1), data)
    assert not any(isinstance(a, (str, os.PathLike)) for a in opened)
    assert len({id(a) for a in opened}) <= 1


def test_outputs_get_the_usual_permissions(tmp_path):
    # Atomic writes go through a private temporary file; the output itself must be readable like
    # any file the user creates (0666 less the umask), for example by colleagues in a study folder.
    previous = os.umask(0o022)
    try:
        image = save_image(tmp_path / "b0_hz.nii.gz", np.zeros((2, 2, 2)), np.eye(4))
        table = write_json(tmp_path / "summary.json", {"a": 1})
        with StreamingWriter(tmp_path / "run.nii.gz", (2, 2, 2, 1), np.eye(4)) as writer:
            writer.write(np.zeros((2, 2, 2)))
    finally:
        os.umask(previous)
    for path in (image, table, tmp_path / "run.nii.gz"):
        assert path.stat().st_mode & 0o777 == 0o644, path


# ---------------------------------------------------------------------------------------------
# gzip through ISA-L (or zlib), hashing while reading


def _gzip_run(tmp_path, name="run.nii.gz", effort="fast"):
    data = np.random.default_rng(4).normal(size=(9, 8, 7, 5)).astype(np.float32)
    with StreamingWriter(tmp_path / name, data.shape, _affine(), gzip_effort=effort) as writer:
        for t in range(data.shape[3]):
            writer.write(data[..., t])
    return tmp_path / name, data


@pytest.mark.parametrize("effort", ["fast", "small"])
def test_isal_outputs_are_standard_gzip_with_the_same_voxels(tmp_path, effort):
    # Outside references: Python's own gzip module decompresses the file, and nibabel (its own
    # zlib reader) loads it with byte-for-byte the same voxels; save_image likewise.
    path, data = _gzip_run(tmp_path, effort=effort)
    raw = gzip.decompress(path.read_bytes())
    assert raw[344:348] == b"n+1\x00" and len(raw) == 352 + data.nbytes
    assert np.asarray(nib.load(path).dataobj).tobytes() == data.tobytes()
    saved = save_image(tmp_path / "one.nii.gz", data[..., 0], _affine(), gzip_effort=effort)
    assert np.asarray(nib.load(saved).dataobj).tobytes() == data[..., 0].tobytes()
    assert np.array_equal(load_image(path).get_fdata(), data)  # and back through our reader


def test_small_effort_gives_smaller_files_and_unknown_effort_is_refused(tmp_path):
    # An int16 EPI-like run (smooth object, noise inside only): the slower level gives a smaller file.
    grid = np.indices((32, 32, 20, 6)).astype(float)
    inside = ((grid[0] - 16) ** 2 + (grid[1] - 16) ** 2 + (grid[2] - 10) ** 2) < 120
    noise = np.random.default_rng(8).normal(0, 20, inside.shape)
    data = np.where(inside, 900 + 50 * np.sin(grid[0] / 3) + noise, 0).astype(np.int16)
    sizes = {}
    for effort in ("fast", "small"):
        path = tmp_path / f"{effort}.nii.gz"
        with StreamingWriter(path, data.shape, _affine(), dtype=np.int16, gzip_effort=effort) as writer:
            for t in range(data.shape[3]):
                writer.write(data[..., t])
        assert np.array_equal(np.asarray(nib.load(path).dataobj), data)
        sizes[effort] = path.stat().st_size
    assert sizes["small"] < sizes["fast"]
    with pytest.raises(InputError, match="gzip_effort"):
        save_image(tmp_path / "x.nii.gz", np.zeros((2, 2, 2)), np.eye(4), gzip_effort="best")


def test_zlib_fallback_without_isal(tmp_path, monkeypatch):
    # Without the isal package, reading and writing go through zlib's gzip with the same results.
    import fieldfix._gzip_io as backend

    with_isal, data = _gzip_run(tmp_path, "isal.nii.gz")
    monkeypatch.setattr(backend, "_IGZIP", None)
    without, _ = _gzip_run(tmp_path, "zlib.nii.gz")
    import io

    assert type(backend.gzip_writer(io.BytesIO(), "fast")) is gzip.GzipFile  # zlib's, not ISA-L's subclass
    for path in (with_isal, without):
        image = load_image(path)
        assert np.array_equal(np.stack([image.volume(t) for t in range(5)], axis=-1), data)
    assert gzip.decompress(with_isal.read_bytes()) == gzip.decompress(without.read_bytes())


@pytest.mark.parametrize("name", ["run.nii.gz", "run.nii"])
def test_streamed_read_gives_the_file_sha256(tmp_path, name):
    # Outside reference: hashlib.sha256 over the file's bytes, read separately.
    from fieldfix.io import reopen_image

    data = np.random.default_rng(6).normal(size=(6, 5, 4, 8)).astype(np.float32)
    nib.save(nib.Nifti1Image(data, np.eye(4)), tmp_path / name)
    image = load_image(tmp_path / name)
    again, reader = reopen_image(image, hashing=True)
    volumes = [again.volume(t) for t in range(8)]
    assert np.array_equal(np.stack(volumes, axis=-1), data)
    assert reader.hexdigest() == hashlib.sha256((tmp_path / name).read_bytes()).hexdigest()
    reader.close()
    provenance = Provenance("test", {}, [tmp_path / name])
    provenance.record_hash(tmp_path / name, "0" * 64)
    assert provenance.input_records()[0]["sha256"] == "0" * 64  # the recorded hash is used, not recomputed


def test_hashing_reader_gives_up_after_a_gap(tmp_path):
    from fieldfix.io import HashingReader

    path = tmp_path / "blob.bin"
    path.write_bytes(bytes(range(256)) * 10)
    reader = HashingReader(path)
    reader.read(100)
    reader.seek(50)
    reader.read(100)  # re-reads bytes 50-99 (a rewind is fine), then goes on in order
    assert reader.hexdigest() == hashlib.sha256(path.read_bytes()).hexdigest()
    reader.close()
    gap = HashingReader(path)
    gap.read(10)
    gap.seek(500)
    gap.read(10)
    assert gap.hexdigest() is None
    gap.close()
