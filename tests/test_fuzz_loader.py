"""Random and mutated bytes into the NIfTI loader: a clean error naming the file, or a load.

Every case must end in exactly one of two ways: ``load_image(path).get_fdata()`` returns an
array of the shape the header describes, or it raises :class:`fieldfix.errors.InputError`
whose message names the file. Any other exception type is a crash; a case that takes more
than a few seconds is a hang. In-process cases are guarded by SIGALRM; the large seeded
loop runs in a child process with a timeout, so even a hang in C code cannot stall the suite.
"""

from __future__ import annotations

import gzip
import json
import logging
import random
import shutil
import signal
import struct
import subprocess
import sys
import textwrap
import warnings
from pathlib import Path

import nibabel as nib
import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings, strategies as st

from fieldfix.errors import InputError
from fieldfix.io import load_image

SCRIPT = shutil.which("fieldfix", path=str(Path(sys.executable).parent)) or shutil.which("fieldfix")
CASE_TIMEOUT_S = 5

# Structural fields of the NIfTI-1 header (offset, struct format), from nifti1.h:
# sizeof_hdr, dim[0..7], intent_code, datatype, bitpix, pixdim[0..3], vox_offset, scl_slope,
# scl_inter, qform_code, sform_code, quatern_b, srow_x[0], magic.
HEADER_FIELDS = [(0, "<i"), (40, "<h"), (42, "<h"), (44, "<h"), (46, "<h"), (48, "<h"), (50, "<h"), (56, "<h"),
                 (68, "<h"), (70, "<h"), (72, "<h"), (76, "<f"), (80, "<f"), (84, "<f"), (88, "<f"), (108, "<f"),
                 (112, "<f"), (116, "<f"), (252, "<h"), (254, "<h"), (256, "<f"), (280, "<f"), (344, "4s")]
INT_VALUES = [0, -1, 1, 2, 3, 4, 5, 7, 8, 16, 255, 256, 1000, 32767, -32768]
FLOAT_VALUES = [0.0, -0.0, 1e-40, 1e38, 3e38, -1.0, float("nan"), float("inf"), float("-inf"), 352.0, 353.0, 1e10]
MAGICS = [b"n+1\0", b"ni1\0", b"n+2\0", b"\0\0\0\0", b"xxxx"]

SHAPE = (16, 16, 8)


def _valid_image() -> nib.Nifti1Image:
    data = (np.random.default_rng(0).random(SHAPE) * 1000).astype(np.int16)
    image = nib.Nifti1Image(data, np.diag([2.0, 2.0, 3.0, 1.0]))
    image.header.set_slope_inter(0.5, 1.0)
    return image


def _valid_nifti2_run() -> nib.Nifti2Image:
    """A small 4D NIfTI-2 run with scaling (NIfTI-2 has 64-bit dimensions and offsets)."""
    data = (np.random.default_rng(1).random(SHAPE + (3,)) * 1000).astype(np.int16)
    image = nib.Nifti2Image(data, np.diag([2.0, 2.0, 3.0, 1.0]))
    image.header.set_slope_inter(2.0, -5.0)
    return image


@pytest.fixture(scope="module")
def valid_bytes(tmp_path_factory):
    """Bytes of a valid small image as .nii and as .nii.gz."""
    folder = tmp_path_factory.mktemp("valid")
    out = {}
    for suffix in (".nii", ".nii.gz"):
        nib.save(_valid_image(), folder / f"v{suffix}")
        out[suffix] = (folder / f"v{suffix}").read_bytes()
    return out


def _on_alarm(signum, frame):
    raise TimeoutError("loader case took too long")


def _check_case(path: Path) -> str:
    """Load one file; return 'loaded' or 'refused'; let anything else propagate."""
    previous = signal.signal(signal.SIGALRM, _on_alarm)
    signal.alarm(CASE_TIMEOUT_S)
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            data = load_image(path).get_fdata()
    except InputError as err:
        assert str(path) in str(err), f"the error does not name the file: {err}"
        assert "\n" not in str(err)
        return "refused"
    finally:
        signal.alarm(0)
        signal.signal(signal.SIGALRM, previous)
    assert isinstance(data, np.ndarray) and data.dtype == np.float32
    return "loaded"


def _read_all(path):
    """What the commands do: open, read everything, and read the last volume of a 4D image."""
    image = load_image(path)
    image.get_fdata()
    if image.ndim == 4:
        image.volume(image.shape[3] - 1)


@pytest.fixture(autouse=True)
def _quiet_nibabel():
    # nibabel logs header fix-ups ("sizeof_hdr should be 348") to stderr; irrelevant here.
    logger = logging.getLogger("nibabel.global")
    level = logger.level
    logger.setLevel(logging.CRITICAL)
    yield
    logger.setLevel(level)


def test_valid_files_load_with_scaling(tmp_path, valid_bytes):
    # Sanity anchor: the unmutated bytes load and match nibabel's own scaled read.
    for suffix, raw in valid_bytes.items():
        path = tmp_path / f"ok{suffix}"
        path.write_bytes(raw)
        assert _check_case(path) == "loaded"
        assert np.allclose(load_image(path).get_fdata(), nib.load(path).get_fdata(), rtol=1e-6)


@pytest.mark.parametrize("suffix", [".nii", ".nii.gz"])
@pytest.mark.parametrize("field", HEADER_FIELDS, ids=lambda f: f"offset{f[0]}")
def test_each_header_field_with_extreme_values(tmp_path, valid_bytes, suffix, field):
    """Every structural header field set to each extreme value: clean refusal or a load."""
    offset, fmt = field
    header = bytearray(gzip.decompress(valid_bytes[".nii.gz"]))
    values = MAGICS if fmt == "4s" else FLOAT_VALUES if fmt == "<f" else \
        [v for v in INT_VALUES if -2 ** 15 <= v < 2 ** 15] + ([2 ** 31 - 1, -2 ** 31] if fmt == "<i" else [])
    outcomes = set()
    for k, value in enumerate(values):
        mutated = bytearray(header)
        struct.pack_into(fmt, mutated, offset, value)
        path = tmp_path / f"case{k}{suffix}"
        path.write_bytes(gzip.compress(bytes(mutated)) if suffix == ".nii.gz" else bytes(mutated))
        outcomes.add(_check_case(path))
    assert outcomes <= {"loaded", "refused"}


def test_header_claiming_more_data_than_the_file_holds(tmp_path, valid_bytes):
    """A header describing a huge image in a tiny file is refused before anything is read."""
    raw = bytearray(gzip.decompress(valid_bytes[".nii.gz"]))
    struct.pack_into("<hhhh", raw, 40, 4, 30000, 30000, 30000)  # dim[0..3]: 2.7e13 voxels
    for suffix, content in ((".nii", bytes(raw)), (".nii.gz", gzip.compress(bytes(raw)))):
        path = tmp_path / f"huge{suffix}"
        path.write_bytes(content)
        with pytest.raises(InputError, match="truncated or corrupt") as info:
            load_image(path)
        assert str(path) in str(info.value)


def test_trailing_singleton_axis_is_dropped_without_reading(tmp_path, monkeypatch):
    """A 4D file with one volume opens as 3D lazily: no voxel is read by load_image."""
    data = np.arange(4 * 5 * 3, dtype=np.int16).reshape(4, 5, 3, 1)
    image = nib.Nifti1Image(data, np.eye(4))
    image.header.set_slope_inter(2.0, -1.0)
    path = tmp_path / "one.nii.gz"
    nib.save(image, path)
    calls = []
    original = nib.arrayproxy.ArrayProxy.__array__
    monkeypatch.setattr(nib.arrayproxy.ArrayProxy, "__array__",
                        lambda self, *a, **k: calls.append(1) or original(self, *a, **k))
    loaded = load_image(path, ndim=(3,))
    assert calls == [] and loaded.shape == (4, 5, 3)
    assert np.array_equal(loaded.get_fdata(), 2.0 * data[..., 0] - 1.0)


def _mutate(raw: bytes, rng: random.Random) -> bytes:
    """One random mutation of a file: flips, header pokes, truncation, splices or pure noise."""
    kind = rng.choice(["flip", "header", "truncate", "noise", "splice", "inner-header"])
    data = bytearray(raw)
    if kind == "flip":
        for _ in range(rng.randint(1, 20)):
            data[rng.randrange(len(data))] = rng.randrange(256)
    elif kind == "header":
        for _ in range(rng.randint(1, 6)):
            data[rng.randrange(min(352, len(data)))] = rng.randrange(256)
    elif kind == "truncate":
        data = data[: rng.randrange(len(data))]
    elif kind == "noise":
        data = bytearray(rng.randbytes(rng.randrange(4000)))
    elif kind == "splice":
        cut = rng.randrange(len(data))
        data = data[:cut] + bytearray(rng.randbytes(rng.randrange(64))) + data[cut:]
    else:  # poke the header inside the gzip stream and recompress, so the CRC stays valid
        try:
            inner = bytearray(gzip.decompress(bytes(data)))
        except OSError:
            inner = data
        for _ in range(rng.randint(1, 4)):
            offset, fmt = rng.choice(HEADER_FIELDS)
            value = rng.choice(MAGICS if fmt == "4s" else FLOAT_VALUES if fmt == "<f" else
                               [v for v in INT_VALUES if -2 ** 15 <= v < 2 ** 15])
            struct.pack_into(fmt, inner, offset, value)
        data = bytearray(gzip.compress(bytes(inner))) if raw[:2] == b"\x1f\x8b" else inner
    return bytes(data)


@settings(max_examples=120, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(seed=st.integers(0, 2 ** 32 - 1), suffix=st.sampled_from([".nii", ".nii.gz"]))
def test_mutated_files_in_process(tmp_path, valid_bytes, seed, suffix):
    path = tmp_path / f"mutated{suffix}"
    path.write_bytes(_mutate(valid_bytes[suffix], random.Random(seed)))
    assert _check_case(path) in {"loaded", "refused"}


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(content=st.binary(max_size=2048), suffix=st.sampled_from([".nii", ".nii.gz"]))
def test_random_bytes_in_process(tmp_path, content, suffix):
    path = tmp_path / f"random{suffix}"
    path.write_bytes(content)
    assert _check_case(path) == "refused"


CHILD = textwrap.dedent("""
    import json, logging, random, sys, warnings
    from pathlib import Path
    sys.path.insert(0, {tests!r})
    logging.getLogger("nibabel.global").setLevel(logging.CRITICAL)
    warnings.simplefilter("ignore")
    from fieldfix.errors import InputError
    from fieldfix.io import load_image
    from test_fuzz_loader import _mutate
    from test_fuzz_loader import _read_all
    folder = Path({folder!r})
    raws = {{(s, k): (folder / (k + s)).read_bytes() for s in (".nii", ".nii.gz") for k in ("v", "v2")}}
    counts = {{"loaded": 0, "refused": 0}}
    crashes = []
    for case in range({n}):
        rng = random.Random(case)
        suffix = rng.choice([".nii", ".nii.gz"])
        kind = rng.choice(["v", "v2"])
        path = folder / ("case" + suffix)
        path.write_bytes(_mutate(raws[suffix, kind], rng))
        try:
            _read_all(path)
            counts["loaded"] += 1
        except InputError as err:
            counts["refused"] += 1
            if str(path) not in str(err):
                crashes.append([case, "InputError without the path", str(err)[:200]])
        except BaseException as err:
            crashes.append([case, type(err).__name__, str(err)[:200]])
    print(json.dumps({{"counts": counts, "crashes": crashes}}))
""")


@pytest.mark.slow
def test_seeded_mutation_loop_in_a_child_process(tmp_path):
    """Many seeded mutations (NIfTI-1 3D and NIfTI-2 4D) in a child process with a timeout."""
    for suffix in (".nii", ".nii.gz"):
        nib.save(_valid_image(), tmp_path / f"v{suffix}")
        nib.save(_valid_nifti2_run(), tmp_path / f"v2{suffix}")
    code = CHILD.format(tests=str(Path(__file__).parent), folder=str(tmp_path), n=600)
    result = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120)
    assert result.returncode == 0, result.stderr[-2000:]
    report = json.loads(result.stdout.strip().splitlines()[-1])
    assert report["crashes"] == [], report["crashes"][:10]
    # Both outcomes occur, so the loop really exercises the loader (not just refusing everything).
    assert report["counts"]["loaded"] > 0 and report["counts"]["refused"] > 100


# ---- through the command line: one line on stderr naming the file, exit status 2 ----

def _cli_commands_reading_one_image(path: Path, out: Path) -> list[list[str]]:
    """Invocations of subcommands that read `path` as their first image (only those installed)."""
    from fieldfix_cli.main import _load_subcommands

    available = _load_subcommands()
    commands = []
    if "unwarp" in available:
        commands.append(["unwarp", str(path), "--b0", str(path), "--phase-encoding", "j-", "--readout-time", "30ms",
                         "--out", str(out), "--no-report"])
    if "fieldmap" in available:
        commands.append(["fieldmap", "--phase-diff", str(path), "--magnitude", str(path),
                         "--echo-times", "4.92ms", "7.38ms", "--out", str(out)])
    return commands


@pytest.mark.parametrize("case", range(4))
@pytest.mark.slow
def test_corrupt_files_through_the_cli(tmp_path, valid_bytes, case):
    suffix = ".nii.gz" if case % 2 else ".nii"
    path = tmp_path / f"broken{suffix}"
    if case == 0:
        content = valid_bytes[suffix][: len(valid_bytes[suffix]) // 3]
    elif case == 1:
        content = b"plain text, not an image\n" * 20
    else:  # the first seeded random mutation that the loader refuses
        for seed in range(1000 * case, 1000 * case + 200):
            content = _mutate(valid_bytes[suffix], random.Random(seed))
            path.write_bytes(content)
            try:
                load_image(path).get_fdata()
            except InputError:
                break
    path.write_bytes(content)
    with pytest.raises(InputError):
        load_image(path).get_fdata()
    commands = _cli_commands_reading_one_image(path, tmp_path / "out")
    if not commands:
        pytest.skip("no subcommand that reads an image is installed yet")
    for argv in commands:
        result = subprocess.run([SCRIPT, *argv], capture_output=True, text=True, timeout=60)
        lines = result.stderr.strip().splitlines()
        assert result.returncode == 2, (argv, result.stderr)
        assert len(lines) == 1 and str(path) in lines[0], result.stderr
        assert not (tmp_path / "out").exists() or not any((tmp_path / "out").iterdir())
        assert path.read_bytes() == content


# ---- sidecar values of any JSON type: a clean refusal or a run, never a crash ----

json_values = st.recursive(
    st.none() | st.booleans() | st.integers(-10 ** 6, 10 ** 6) | st.floats(allow_nan=False)
    | st.sampled_from(["j-", "i", "k-", "AP", "", "0.03", "30ms", "nan"]),
    lambda inner: st.lists(inner, max_size=3) | st.dictionaries(st.text(max_size=3), inner, max_size=2),
    max_leaves=4,
)
SIDECAR_KEYS = ["PhaseEncodingDirection", "TotalReadoutTime", "EffectiveEchoSpacing", "RepetitionTime",
                "ReconMatrixPE"]


@pytest.fixture(scope="module")
def unwarp_inputs(tmp_path_factory):
    folder = tmp_path_factory.mktemp("sidecar-fuzz")
    affine = np.diag([2.5, 2.5, 2.5, 1.0])
    run = folder / "run.nii.gz"
    nib.save(nib.Nifti1Image(np.random.default_rng(2).random(SHAPE + (2,)).astype(np.float32), affine), run)
    b0 = folder / "b0_hz.nii.gz"
    nib.save(nib.Nifti1Image(np.full(SHAPE, 10.0, np.float32), affine), b0)
    return folder, run, b0


VALID_SIDECAR = {"PhaseEncodingDirection": "j-", "TotalReadoutTime": 0.03, "EffectiveEchoSpacing": 0.002,
                 "RepetitionTime": 2.0, "ReconMatrixPE": SHAPE[1]}


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(changes=st.dictionaries(st.sampled_from(SIDECAR_KEYS), json_values | st.just("<absent>"), min_size=1,
                               max_size=2))
def test_sidecar_values_of_any_type_into_unwarp(unwarp_inputs, capsys, changes):
    """A valid sidecar with one or two values replaced by any JSON value (or removed)."""
    _check_unwarp_with_sidecar(unwarp_inputs, capsys, changes)


@pytest.mark.parametrize("value", ["j-", [], {"a": 1}, 16.5, True], ids=["text", "list", "object", "fraction",
                                                                    "bool"])
def test_sidecar_recon_matrix_of_any_type_into_unwarp(unwarp_inputs, capsys, value):
    # Found by the test above: int(ReconMatrixPE) used to crash with a traceback.
    assert _check_unwarp_with_sidecar(unwarp_inputs, capsys, {"ReconMatrixPE": value}) == 2


def _check_unwarp_with_sidecar(unwarp_inputs, capsys, changes):
    from fieldfix_cli.main import main

    folder, run, b0 = unwarp_inputs
    sidecar = {**VALID_SIDECAR, **changes}
    sidecar = {k: v for k, v in sidecar.items() if v != "<absent>"}
    (folder / "run.json").write_text(json.dumps(sidecar))
    out = folder / "out"
    if out.exists():
        shutil.rmtree(out)
    status = main(["unwarp", str(run), "--b0", str(b0), "--out", str(out), "--no-report"])
    _assert_clean_outcome(status, capsys.readouterr().err, out, "run_corrected.nii.gz")
    return status


def _assert_clean_outcome(status: int, err: str, out, expected_output: str) -> None:
    """A command either succeeds with its output, or refuses with one error line and writes nothing."""
    assert status in (0, 2), err
    if status == 2:
        lines = err.strip().splitlines()
        assert len(lines) == 1 and "error:" in lines[0], err
        assert not out.exists() or list(out.iterdir()) == []
    else:
        assert (out / expected_output).is_file()


@pytest.fixture(scope="module")
def fieldmap_inputs(tmp_path_factory):
    from test_bad_input import make_magnitude, make_phasediff

    folder = tmp_path_factory.mktemp("echo-fuzz")
    return folder, make_phasediff(folder), make_magnitude(folder)


@settings(max_examples=30, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(changes=st.dictionaries(st.sampled_from(["EchoTime1", "EchoTime2"]), json_values | st.just("<absent>"),
                               min_size=1, max_size=2))
def test_echo_time_values_of_any_type_into_fieldmap(fieldmap_inputs, capsys, changes):
    from fieldfix_cli.main import main

    folder, phasediff, magnitude = fieldmap_inputs
    sidecar = {**{"EchoTime1": 0.00492, "EchoTime2": 0.00738}, **changes}
    (folder / "sub-01_phasediff.json").write_text(json.dumps({k: v for k, v in sidecar.items() if v != "<absent>"}))
    out = folder / "out"
    if out.exists():
        shutil.rmtree(out)
    status = main(["fieldmap", "--phase-diff", str(phasediff), "--magnitude", str(magnitude), "--out", str(out)])
    _assert_clean_outcome(status, capsys.readouterr().err, out, "b0_hz.nii.gz")
