"""Property-based fuzzing of NIfTI-1 headers: whatever the fields say, only roikit errors (or success) escape.

Every generated file is a NIfTI-1 header whose fields (dim, pixdim, datatype, bitpix, vox_offset, scl_slope,
scl_inter, qform/sform codes and parameters, magic) take random values, valid and invalid alike, followed by a
random amount of voxel data (often truncated), written as ``.nii`` or ``.nii.gz``. Each file goes through
``read_header``, ``read_flat``, ``load_map`` and ``extract`` (with a sphere placed on the file's own grid). The
seed is fixed (``derandomize=True``) so CI sees the same 1,000 cases every run; the counts of the errors raised
are printed (``pytest -s``) and checked to be non-trivial (the fuzzer reaches both success and many error
kinds).
"""

from __future__ import annotations

import collections
import gzip
import re
import warnings

import nibabel as nib
import numpy as np
import pandas as pd
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from roikit.errors import RoikitError
from roikit.extraction import extract
from roikit.images import load_map, read_flat, read_header
from roikit.regions import RegionSet, Sphere

#: (class, first words of the message) -> count, over every generated case and every reader
COUNTS: collections.Counter = collections.Counter()
OUTCOMES: collections.Counter = collections.Counter()

_DATATYPES = [2, 4, 8, 16, 64, 256, 512, 768, 1024, 1280, 128, 32, 2304, 1536, 0, 1, 3, 255, 9999, -4, 32767]
_FLOATS = st.one_of(
    st.floats(allow_nan=True, allow_infinity=True, width=32),
    st.sampled_from([0.0, 1.0, -1.0, 2.0, 1e-30, 1e30, float("nan"), float("inf"), -0.0]),
)
_DIMS = st.one_of(st.integers(1, 12), st.integers(1, 12), st.integers(-3, 12),
                  st.sampled_from([0, 1, 2, 3, 1000, 32767, -32768]))


@st.composite
def nifti_files(draw):
    ndim = draw(st.one_of(st.sampled_from([3, 3, 3, 4, 4, 5]), st.integers(-1, 9), st.sampled_from([100, -100])))
    dims = [draw(_DIMS) for _ in range(7)]
    pixdim = [draw(_FLOATS) for _ in range(8)]
    fields = {
        "dim": [ndim] + dims,
        "pixdim": pixdim,
        "datatype": draw(st.sampled_from(_DATATYPES)),
        "bitpix": draw(st.sampled_from([0, 8, 16, 32, 64, 128, 7, -8])),
        "vox_offset": draw(st.one_of(st.sampled_from([352.0, 0.0, 348.0, 353.0, 1e9, -352.0, float("nan")]),
                                     st.floats(-1e4, 1e4, width=32))),
        "scl_slope": draw(_FLOATS),
        "scl_inter": draw(_FLOATS),
        "qform_code": draw(st.sampled_from([0, 1, 2, 4, -1, 99])),
        "sform_code": draw(st.sampled_from([0, 1, 2, 4, -1, 99])),
        "quatern_b": draw(_FLOATS),
        "quatern_c": draw(_FLOATS),
        "quatern_d": draw(_FLOATS),
        "srow_x": [draw(_FLOATS) for _ in range(4)],
        "srow_y": [draw(_FLOATS) for _ in range(4)],
        "srow_z": [draw(_FLOATS) for _ in range(4)],
        "magic": draw(st.sampled_from([b"n+1", b"n+1", b"n+1", b"ni1", b"xyz", b""])),
    }
    n_fields = draw(st.sampled_from([1, 1, 1, 2, 2, 3, 4, 6, len(fields)]))
    chosen = draw(st.lists(st.sampled_from(sorted(fields)), min_size=n_fields, max_size=n_fields, unique=True))
    data_bytes = draw(st.one_of(st.integers(0, 4096), st.sampled_from([0, 1, 7, 64, 512, 2048])))
    compressed = draw(st.booleans())
    gzip_cut = draw(st.sampled_from([None, None, None, 10, 30, -8, -1]))
    return {k: fields[k] for k in chosen}, data_bytes, compressed, gzip_cut


def _base_header() -> nib.Nifti1Header:
    img = nib.Nifti1Image(np.zeros((4, 5, 6), np.float32), np.diag([2.0, 2.0, 2.0, 1.0]))
    header = img.header.copy()
    header.set_data_dtype(np.float32)
    header["vox_offset"] = 352
    return header


def _write(tmp_path, case) -> str:
    fields, data_bytes, compressed, gzip_cut = case
    header = _base_header()
    for key, value in fields.items():
        with np.errstate(all="ignore"):
            try:
                header[key] = value
            except (ValueError, OverflowError, TypeError):
                pass  # numpy refuses this value for the field's type: keep the valid one
    rng = np.random.default_rng(data_bytes)
    blob = header.binaryblock + b"\x00" * 4 + rng.integers(0, 256, data_bytes, dtype=np.uint8).tobytes()
    path = tmp_path / ("case.nii.gz" if compressed else "case.nii")
    if compressed:
        blob = gzip.compress(blob, compresslevel=1)
        if gzip_cut is not None:
            blob = blob[:gzip_cut]
    path.write_bytes(blob)
    return str(path)


def _key(exc: BaseException) -> str:
    message = re.sub(r"^\S+case\.nii(\.gz)?: ", "", str(exc))
    message = re.sub(r"[-+]?\d[\d,.e+-]*", "N", message)
    return f"{type(exc).__name__}: {' '.join(message.split()[:7])}"


def _attempt(step: str, func):
    try:
        result = func()
    except RoikitError as exc:
        COUNTS[_key(exc)] += 1
        OUTCOMES[f"{step}: {type(exc).__name__}"] += 1
        return None
    OUTCOMES[f"{step}: ok"] += 1
    return result


@pytest.fixture(scope="module", autouse=True)
def _report_counts():
    yield
    if COUNTS or OUTCOMES:
        print("\nNIfTI header fuzzer: outcomes per reader")
        for key, n in sorted(OUTCOMES.items()):
            print(f"  {n:5d}  {key}")
        print("roikit errors raised (class: first words of the message, numbers as N)")
        for key, n in COUNTS.most_common():
            print(f"  {n:5d}  {key}")


@settings(max_examples=1000, derandomize=True, deadline=None, database=None,
          suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large, HealthCheck.function_scoped_fixture])
@given(case=nifti_files())
def test_only_roikit_errors_escape_from_any_header(tmp_path, case):
    path = _write(tmp_path, case)
    OUTCOMES["cases"] += 1
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        header = _attempt("read_header", lambda: read_header(path))
        if header is not None:
            _attempt("read_flat", lambda: read_flat(header, volume=0 if header.n_volumes > 1 else None))
        _attempt("load_map", lambda: load_map(path, volume=0 if header is not None and header.n_volumes > 1
                                              else None))
        if header is not None:
            grid = header.grid
            centre = grid.voxel_to_world((np.array(grid.shape) - 1) / 2.0)
            radius = float(min(max(grid.voxel_sizes.max() * 1.5, 1e-3), 1000.0))
            maps = pd.DataFrame([{"participant_id": "sub-01", "contrast": "novel", "path": path,
                                  "volume": 0 if header.n_volumes > 1 else None}])
            if header.n_volumes == 1:
                maps = maps.drop(columns="volume")
            _attempt("extract", lambda: extract(maps, RegionSet([Sphere("probe", tuple(centre), radius)]),
                                                progress=False))


def test_the_fuzzer_reached_both_success_and_many_error_kinds():
    if OUTCOMES["cases"] < 1000:
        pytest.skip("runs after the fuzzer in the same session")
    assert OUTCOMES["read_header: ok"] > 50
    assert OUTCOMES["extract: ok"] > 10
    assert len({k.split(":")[0] for k in COUNTS}) >= 2
    assert sum(COUNTS.values()) > 300
