"""Hostile NIfTI files and starved processes: one line naming the file, exit 2, nothing written.

Each test makes its hostile file itself (header bytes poked after nibabel wrote a valid image,
so nibabel's own checks on writing are bypassed as a hand-made file would bypass them) and runs
the command in process (``fieldfix_cli.main.main``), with every Python warning recorded: a raw
numpy or nibabel warning on stderr counts as a failure. The NIfTI-1 header layout (offsets of
``datatype``, ``bitpix``, ``pixdim``, ``qform_code``, ``sform_code``, ``quatern_b``, ``srow_x``) is
that of nifti1.h (NIfTI Data Format Working Group, 2004). Memory bounds are checked in a child
process under ``resource.RLIMIT_AS``.
"""

from __future__ import annotations

import errno
import gzip
import io
import json
import os
import re
import struct
import subprocess
import sys
import textwrap
import time
import warnings
import zlib
from pathlib import Path

import nibabel as nib
import numpy as np
import pytest
from _mounts import mounted_tmpfs

from fieldfix._memory import MEMORY_ENV, WORKING_COPIES, memory_budget
from fieldfix.errors import InputError, MemoryLimitError
from fieldfix.io import load_image
from fieldfix_cli.main import main

SHAPE = (16, 16, 8)
VOXEL_MM = 2.5
SIDECAR = {"PhaseEncodingDirection": "j-", "TotalReadoutTime": 0.03, "RepetitionTime": 2.0}
# nifti1.h offsets
DATATYPE, BITPIX, PIXDIM, QFORM_CODE, SFORM_CODE, QUATERN_B, SROW_X = 70, 72, 76, 252, 254, 256, 280


def _affine() -> np.ndarray:
    affine = np.diag([VOXEL_MM, VOXEL_MM, VOXEL_MM, 1.0])
    affine[:3, 3] = -(np.array(SHAPE) - 1) / 2 * VOXEL_MM
    return affine


def _head() -> np.ndarray:
    i, j, k = np.meshgrid(*[np.linspace(-1, 1, n) for n in SHAPE], indexing="ij")
    return np.where(i ** 2 / 0.7 + j ** 2 / 0.8 + k ** 2 / 0.9 < 1, 1000.0, 0.0)


def _field_hz() -> np.ndarray:
    i, j, k = np.meshgrid(*[np.linspace(-1, 1, n) for n in SHAPE], indexing="ij")
    return 30.0 * np.exp(-2 * ((i - 0.2) ** 2 + (j + 0.1) ** 2 + k ** 2))


def _save(path: Path, data, sidecar=None) -> Path:
    image = nib.Nifti1Image(np.asarray(data), _affine())
    image.header.set_xyzt_units("mm", "sec")
    if np.asarray(data).ndim == 4:
        image.header.set_zooms((VOXEL_MM,) * 3 + (2.0,))
    nib.save(image, path)
    if sidecar is not None:
        path.with_name(path.name.replace(".nii.gz", ".json")).write_text(json.dumps(sidecar))
    return path


def _inputs(folder: Path) -> dict:
    run = np.stack([_head() * (1 + 0.01 * t) for t in range(3)], axis=-1).astype(np.float32)
    return {"run": _save(folder / "sub-01_task-rest_bold.nii.gz", run, SIDECAR),
            "b0": _save(folder / "b0_hz.nii.gz", _field_hz().astype(np.float32))}


def _poke(path: Path, *fields) -> None:
    """Overwrite header fields (offset, struct format, value) inside the gzip stream."""
    raw = bytearray(gzip.decompress(path.read_bytes()))
    for offset, fmt, *values in fields:
        struct.pack_into(fmt, raw, offset, *values)
    path.write_bytes(gzip.compress(bytes(raw)))


def _replace_data(path: Path, data: np.ndarray, datatype: int, bitpix: int) -> None:
    """Keep the header, give it another data type code and these voxel bytes (Fortran order)."""
    raw = bytearray(gzip.decompress(path.read_bytes()))
    offset = int(struct.unpack_from("<f", raw, 108)[0])
    struct.pack_into("<hh", raw, DATATYPE, datatype, bitpix)
    path.write_bytes(gzip.compress(bytes(raw[:offset]) + np.asfortranarray(data).tobytes(order="F")))


def _singular_sform(path):
    _poke(path, (SROW_X + 32, "<4f", 0.0, 0.0, 0.0, 0.0), (SFORM_CODE, "<h", 2))  # srow_z = 0: no third axis


def _nan_sform(path):
    _poke(path, (SROW_X + 12, "<f", float("nan")), (SFORM_CODE, "<h", 2))


def _nan_qform_only(path):
    _poke(path, (QUATERN_B, "<f", float("nan")), (QFORM_CODE, "<h", 1), (SFORM_CODE, "<h", 0))


def _pixdim(axis, value, *, codes_zero=True):
    def mutate(path):
        fields = [(PIXDIM + 4 * axis, "<f", value)]
        if codes_zero:  # no sform or qform: the voxel sizes alone place the image (nibabel would read 0 as 1 mm)
            fields += [(QFORM_CODE, "<h", 0), (SFORM_CODE, "<h", 0)]
        _poke(path, *fields)
    return mutate


def _complex(dtype, code, bitpix):
    def mutate(path):
        values = np.asarray(nib.load(path).dataobj)
        _replace_data(path, (values * (1 + 0.5j)).astype(dtype), code, bitpix)
    return mutate


def _colour(n_channels, code):
    def mutate(path):
        shape = nib.load(path).shape
        _replace_data(path, np.full(shape + (n_channels,), 7, np.uint8).reshape(shape + (n_channels,)), code,
                      8 * n_channels)
    return mutate


def _extended_float(path):
    values = np.asarray(nib.load(path).dataobj, np.float64)
    _replace_data(path, np.stack([values, np.zeros_like(values)], axis=-1), 1536, 128)  # 16 bytes a voxel


HEADERS = [
    pytest.param("run", _pixdim(1, 0.0), r"voxel size along the first \(i\) axis \(pixdim\[1\]\) is 0;",
                 id="run-pixdim-zero"),
    pytest.param("b0", _pixdim(2, 0.0), r"pixdim\[2\]\) is 0;", id="b0-pixdim-zero"),
    pytest.param("b0", _pixdim(3, -2.5, codes_zero=False), r"pixdim\[3\]\) is -2.5;", id="b0-pixdim-negative"),
    pytest.param("run", _pixdim(1, float("nan")), r"pixdim\[1\]\) is nan;", id="run-pixdim-nan"),
    pytest.param("b0", _pixdim(1, float("inf"), codes_zero=False), r"pixdim\[1\]\) is inf;", id="b0-pixdim-inf"),
    pytest.param("run", _singular_sform, r"affine \(sform\) is singular", id="run-affine-singular"),
    pytest.param("b0", _singular_sform, r"affine \(sform\) is singular", id="b0-affine-singular"),
    pytest.param("b0", _nan_sform, r"position in space is undefined.*\(sform\) has NaN", id="b0-affine-nan"),
    pytest.param("run", _nan_qform_only, r"position in space is undefined.*\(qform\) has NaN",
                 id="run-qform-nan"),
    pytest.param("b0", _complex(np.complex64, 32, 64), r"complex data \(complex64\).*separate images",
                 id="b0-complex64"),
    pytest.param("run", _complex(np.complex128, 1792, 128), r"complex data \(complex128\)", id="run-complex128"),
    pytest.param("b0", _colour(3, 128), r"colour data \(RGB\)", id="b0-rgb24"),
    pytest.param("run", _colour(4, 2304), r"colour data \(RGBA\)", id="run-rgba32"),
    pytest.param("b0", _extended_float, r"data type float128 is not supported; use integers or floats", id="b0-float128"),
]


def _run_cli(capsys, argv) -> tuple[int, list[str], list]:
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        status = main([str(a) for a in argv])
    out, err = capsys.readouterr()
    assert "Traceback" not in out + err
    return status, [line for line in err.splitlines() if line.strip()], caught


def _unwarp_argv(paths, out):
    return ["unwarp", paths["run"], "--b0", paths["b0"], "--out", out, "--no-report", "--quiet"]


def _dropout_argv(paths, out):
    return ["dropout", "--b0", paths["b0"], "--te", "30ms", "--thickness", "3mm", "--out", out, "--quiet"]


def _assert_refused(status, err, caught, pattern, named: Path, out: Path, before: dict):
    assert status == 2, err
    assert len(err) == 1, err
    assert err[0].startswith("fieldfix ") and ": error: " in err[0]
    assert str(named) in err[0], err[0]
    assert re.search(pattern, err[0]), err[0]
    assert not [str(w.message) for w in caught], [f"{w.category.__name__}: {w.message}" for w in caught]
    assert not out.exists() or not any(out.iterdir()), sorted(p.name for p in out.iterdir())
    for path, content in before.items():
        assert path.read_bytes() == content


def _snapshot(folder: Path) -> dict:
    return {p: p.read_bytes() for p in folder.iterdir() if p.is_file()}


@pytest.mark.parametrize("target, mutate, pattern", HEADERS)
def test_hostile_headers_are_refused_by_unwarp(tmp_path, capsys, target, mutate, pattern):
    paths = _inputs(tmp_path)
    mutate(paths[target])
    before = _snapshot(tmp_path)
    status, err, caught = _run_cli(capsys, _unwarp_argv(paths, tmp_path / "out"))
    _assert_refused(status, err, caught, pattern, paths[target], tmp_path / "out", before)
    assert "overlap" not in err[0]  # NaN geometry is said as such


@pytest.mark.parametrize("mutate, pattern", [p.values[1:] for p in HEADERS if p.values[0] == "b0"][:1] +
                         [(_nan_sform, r"position in space is undefined"), (_singular_sform, r"singular"),
                          (_complex(np.complex64, 32, 64), "complex")])
def test_hostile_field_maps_are_refused_by_dropout(tmp_path, capsys, mutate, pattern):
    paths = _inputs(tmp_path)
    mutate(paths["b0"])
    before = _snapshot(tmp_path)
    status, err, caught = _run_cli(capsys, _dropout_argv(paths, tmp_path / "out"))
    _assert_refused(status, err, caught, pattern, paths["b0"], tmp_path / "out", before)


def test_valid_headers_still_load_and_a_mirrored_affine_is_fine(tmp_path):
    """The checks refuse only what is broken: a left-right flipped sform (negative determinant) loads."""
    path = _save(tmp_path / "flipped.nii.gz", _field_hz().astype(np.float32))
    flipped = _affine() @ np.diag([-1.0, 1.0, 1.0, 1.0])
    _poke(path, (SROW_X, "<4f", *flipped[0]), (SFORM_CODE, "<h", 2))
    image = load_image(path)
    assert np.allclose(image.affine, flipped)
    assert np.allclose(image.get_fdata(), _field_hz(), atol=1e-5)


def test_successful_jobs_leave_no_warnings(tmp_path, capsys):
    paths = _inputs(tmp_path)
    status, err, caught = _run_cli(capsys, _unwarp_argv(paths, tmp_path / "u"))
    assert status == 0 and not caught, [str(w.message) for w in caught]
    status, err, caught = _run_cli(capsys, _dropout_argv(paths, tmp_path / "d"))
    assert status == 0 and not caught, [str(w.message) for w in caught]


def test_field_map_values_beyond_float32_are_refused_without_a_warning(tmp_path, capsys):
    paths = _inputs(tmp_path)
    values = _field_hz()
    values[0, 0, 0] = 1e39  # fits float64, not float32: read as infinite, refused as such
    _save(paths["b0"], values)
    status, err, caught = _run_cli(capsys, _unwarp_argv(paths, tmp_path / "out"))
    _assert_refused(status, err, caught, r"NaN or infinite", paths["b0"], tmp_path / "out", {})


# ----------------------------------------------------------------------------- messages
def test_integer_phase_encode_code_gets_its_own_message(tmp_path, capsys):
    paths = _inputs(tmp_path)
    side = paths["run"].with_name("sub-01_task-rest_bold.json")
    side.write_text(json.dumps({**SIDECAR, "PhaseEncodingDirection": 1}))
    before = _snapshot(tmp_path)
    status, err, caught = _run_cli(capsys, _unwarp_argv(paths, tmp_path / "out"))
    _assert_refused(status, err, caught, r"PhaseEncodingDirection 1 in the sidecar is a number; BIDS writes it "
                    r"as one of i j k i- j- k-", side, tmp_path / "out", before)


def test_out_of_memory_during_a_job_is_said_as_such(tmp_path, capsys, monkeypatch):
    import fieldfix.workflows.dropout as dropout_job

    def starved(*args, **kwargs):
        raise MemoryError

    monkeypatch.setattr(dropout_job, "dropout_maps", starved)
    paths = _inputs(tmp_path)
    status, err, caught = _run_cli(capsys, _dropout_argv(paths, tmp_path / "out"))
    assert status == 2 and len(err) == 1 and "out of memory" in err[0] and "corrupt" not in err[0], err
    assert not (tmp_path / "out").exists() or not [p for p in (tmp_path / "out").iterdir()
                                                    if not p.name.startswith(".")]


def test_a_decompressor_out_of_memory_is_not_called_corruption(tmp_path):
    image = load_image(_save(tmp_path / "b0.nii.gz", _field_hz().astype(np.float32)))

    def failing():
        raise zlib.error("Error -4 while decompressing data: insufficient memory")

    with pytest.raises(MemoryLimitError, match="ran out of memory reading the image") as info:
        image._read(failing)
    assert str(image.path) in str(info.value) and "corrupt" not in str(info.value)
    with pytest.raises(InputError, match="truncated or corrupt"):
        image._read(lambda: (_ for _ in ()).throw(zlib.error("Error -3 while decompressing data: invalid")))


@pytest.fixture
def read_only_folder(tmp_path):
    """A folder no file can be created in: a read-only tmpfs (root) or a folder without write permission."""
    folder = tmp_path / "locked"
    folder.mkdir()
    if os.geteuid() != 0:
        folder.chmod(0o555)
        yield folder
        folder.chmod(0o755)
        return
    with mounted_tmpfs(folder, "ro,size=64k"):
        yield folder


def test_read_only_output_folder_is_one_line(tmp_path, capsys, read_only_folder):
    paths = _inputs(tmp_path)
    status, err, caught = _run_cli(capsys, _unwarp_argv(paths, read_only_folder))
    assert status == 2 and len(err) == 1, err
    assert str(read_only_folder) in err[0] and os.strerror(errno.EROFS if os.geteuid() == 0 else errno.EACCES) \
        in err[0], err[0]
    assert not any(read_only_folder.iterdir())


# ----------------------------------------------------------------------------- memory
def test_memory_override_refuses_before_reading_and_bad_values_are_one_line(tmp_path, capsys, monkeypatch):
    paths = _inputs(tmp_path)
    monkeypatch.setenv(MEMORY_ENV, "64K")  # 2048 voxels x 4 bytes x 8 copies = 64 KiB fits; the run too
    assert memory_budget().available_bytes == 64 * 1024
    status, err, caught = _run_cli(capsys, _unwarp_argv(paths, tmp_path / "ok"))
    assert status == 0, err
    monkeypatch.setenv(MEMORY_ENV, "63K")
    status, err, caught = _run_cli(capsys, _unwarp_argv(paths, tmp_path / "out"))
    _assert_refused(status, err, caught, rf"too large for the memory available.*{WORKING_COPIES} such copies.*"
                    rf"{MEMORY_ENV}=63K", paths["b0"], tmp_path / "out", {})
    monkeypatch.setenv(MEMORY_ENV, "lots")
    status, err, caught = _run_cli(capsys, _unwarp_argv(paths, tmp_path / "bad"))
    assert status == 2 and len(err) == 1 and f"{MEMORY_ENV}='lots' is not a memory size" in err[0], err


def test_whole_image_reads_are_slabs_in_the_requested_precision(tmp_path, monkeypatch):
    """A scaled int16 image read as float32 never holds a float64 copy of itself (tracemalloc peak)."""
    import tracemalloc

    import fieldfix.io as fio

    shape = (64, 64, 40)
    data = (np.arange(np.prod(shape)) % 3000).reshape(shape).astype(np.int16)
    image = nib.Nifti1Image(data, _affine())
    image.header.set_slope_inter(0.25, -10.0)
    nib.save(image, tmp_path / "scaled.nii.gz")
    monkeypatch.setattr(fio, "_SLAB_VOXELS", 64 * 64 * 4)
    loaded = load_image(tmp_path / "scaled.nii.gz")
    tracemalloc.start()
    values = loaded.get_fdata(np.float32)
    peak = tracemalloc.get_traced_memory()[1]
    tracemalloc.stop()
    assert values.dtype == np.float32 and values.flags.f_contiguous
    assert np.array_equal(values, (0.25 * data - 10.0).astype(np.float32))  # nibabel's scaling, exact here
    float32_bytes = values.nbytes
    assert peak < 2 * float32_bytes, (peak, float32_bytes)  # with a whole float64 copy it would be 3x


def test_field_maps_are_read_in_single_precision(tmp_path):
    from fieldfix.workflows._b0 import read_field_hz

    path = _save(tmp_path / "b0.nii.gz", _field_hz())  # stored as float64
    values, how = read_field_hz(load_image(path))
    assert values.dtype == np.float32 and np.allclose(values, _field_hz(), rtol=1e-6)


def _inflating_field_map(path: Path, shape=(1000, 1000, 375)) -> Path:
    """A ~1.46 MB .nii.gz whose header declares 1.5 GB of float32 zeros (all there, as gzip members)."""
    header = nib.Nifti1Header()
    header.set_data_shape(shape)
    header.set_data_dtype(np.float32)
    header.set_sform(np.diag([1.0, 1.0, 1.0, 1.0]), code=1)
    header.set_data_offset(352)
    buffer = io.BytesIO()
    header.write_to(buffer)
    first = buffer.getvalue().ljust(352, b"\0")
    block = 16 * 2 ** 20
    total = int(np.prod(shape)) * 4
    full, rest = divmod(total, block)
    member = gzip.compress(bytes(block), compresslevel=9)
    path.write_bytes(gzip.compress(first + bytes(rest), compresslevel=9) + member * full)
    return path


_STARVED_CHILD = textwrap.dedent("""
    import resource, sys
    resource.setrlimit(resource.RLIMIT_AS, (2 ** 30, 2 ** 30))
    from fieldfix_cli.main import main
    status = main(sys.argv[1:])
    peak = [l for l in open("/proc/self/status") if l.startswith("VmHWM")][0].split()[1]
    print("peak_kib", peak)
    sys.exit(status)
""")


def test_a_small_file_declaring_1_5_gb_is_refused_fast_under_a_1_gib_limit(tmp_path):
    big = _inflating_field_map(tmp_path / "b0_hz.nii.gz")
    assert big.stat().st_size < 2e6
    argv = ["dropout", "--b0", str(big), "--te", "30ms", "--thickness", "3mm", "--out", str(tmp_path / "out")]
    env = {k: v for k, v in os.environ.items() if k != MEMORY_ENV} | {"OMP_NUM_THREADS": "1",
                                                                       "OPENBLAS_NUM_THREADS": "1",
                                                                       "NUMBA_NUM_THREADS": "1"}
    start = time.monotonic()
    result = subprocess.run([sys.executable, "-c", _STARVED_CHILD, *argv], capture_output=True, text=True,
                            timeout=120, env=env)
    elapsed = time.monotonic() - start
    lines = [line for line in result.stderr.splitlines() if line.strip()]
    assert result.returncode == 2 and len(lines) == 1, result.stderr
    assert str(big) in lines[0] and "too large for the memory available" in lines[0], lines[0]
    assert "address-space limit" in lines[0], lines[0]
    peak_kib = int(result.stdout.split("peak_kib")[1].split()[0])
    assert peak_kib * 1024 < 2 ** 30 and peak_kib * 1024 < 400 * 2 ** 20, peak_kib  # no voxel was read
    assert elapsed < 30, elapsed
    assert not (tmp_path / "out").exists() or not any((tmp_path / "out").iterdir())
    # With the budget overridden the read is tried, and running out of memory is said as such.
    env[MEMORY_ENV] = "100G"
    result = subprocess.run([sys.executable, "-c", _STARVED_CHILD, *argv], capture_output=True, text=True,
                            timeout=120, env=env)
    lines = [line for line in result.stderr.splitlines() if line.strip()]
    assert result.returncode == 2 and len(lines) == 1, result.stderr
    assert "memory" in lines[0] and "truncated or corrupt" not in lines[0] and "Traceback" not in result.stderr


def test_a_decompression_bomb_is_refused_even_where_memory_would_allow_it(tmp_path, capsys, monkeypatch):
    """On a machine with room for the inflated data, a 1000-fold inflating field map is still not read."""
    import fieldfix._memory as memory

    monkeypatch.delenv(MEMORY_ENV, raising=False)
    monkeypatch.setattr(memory, "memory_budget", lambda: memory.MemoryBudget(2 ** 40, "a large machine"))
    big = _inflating_field_map(tmp_path / "b0_hz.nii.gz")
    start = time.monotonic()
    status, err, caught = _run_cli(capsys, ["dropout", "--b0", big, "--te", "30ms", "--thickness", "3mm",
                                            "--out", tmp_path / "out", "--quiet"])
    assert time.monotonic() - start < 10
    _assert_refused(status, err, caught, r"would inflate to 1\.4 GiB of data \(10\d\d times.*decompression bomb",
                    big, tmp_path / "out", {})


def test_a_batch_task_out_of_memory_is_reported_as_such():
    from fieldfix.batch.tasks import _reason

    assert _reason(MemoryError()) == "out of memory: the task needed more memory than the worker could give"
    assert _reason(ValueError("x")) == "ValueError: x"


@pytest.mark.parametrize("target, mutate, pattern", [
    ("pd", _complex(np.complex64, 32, 64), r"complex data \(complex64\)"),
    ("mag", _pixdim(1, 0.0), r"pixdim\[1\]\) is 0;"),
    ("mag", _singular_sform, r"singular"),
], ids=["phase-complex", "magnitude-pixdim-zero", "magnitude-affine-singular"])
def test_hostile_field_map_inputs_are_refused_by_fieldmap(tmp_path, capsys, target, mutate, pattern):
    delta_te_s = 0.00246
    phase = np.angle(np.exp(2j * np.pi * _field_hz() * delta_te_s)).astype(np.float32)
    paths = {"pd": _save(tmp_path / "sub-01_phasediff.nii.gz", phase, {"EchoTime1": 0.00492, "EchoTime2": 0.00738}),
             "mag": _save(tmp_path / "sub-01_magnitude1.nii.gz", _head().astype(np.float32))}
    mutate(paths[target])
    before = _snapshot(tmp_path)
    status, err, caught = _run_cli(capsys, ["fieldmap", "--phase-diff", paths["pd"], "--magnitude", paths["mag"],
                                            "--out", tmp_path / "out", "--quiet"])
    _assert_refused(status, err, caught, pattern, paths[target], tmp_path / "out", before)
