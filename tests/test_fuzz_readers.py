"""Fuzzed readers (issue 13, item 8): random and truncated bytes, wrong shapes and types.

Property-based tests (hypothesis; MacIver et al., J. Open Source Softw. 4, 1891 (2019)):
whatever the bytes, ``pmap.open_cube`` either returns a valid cube or raises a
``PmapError`` subclass — never another exception, never a hang.
"""

from __future__ import annotations

import io
import json

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import pmap
from pmap.errors import PmapError

SETTINGS = settings(max_examples=40, deadline=None,
                    suppress_health_check=[HealthCheck.function_scoped_fixture])


def _open_must_be_clean(path):
    try:
        cube = pmap.open_cube(path)
        _ = cube.isel({d: slice(0, 1) for d in cube.dims}).values  # reading a value works
    except PmapError:
        pass


@SETTINGS
@given(data=st.binary(max_size=2048),
       ext=st.sampled_from([".npy", ".tif", ".nc", ".h5", ".csv", ".txt", ".dat", ""]))
def test_random_bytes(tmp_path_factory, data, ext):
    p = tmp_path_factory.mktemp("fz") / f"f{ext}"
    p.write_bytes(data)
    _open_must_be_clean(p)


def _valid_npy(shape=(3, 4, 16)):
    buf = io.BytesIO()
    np.save(buf, np.random.default_rng(0).random(shape).astype(np.float32))
    return buf.getvalue()


@SETTINGS
@given(cut=st.integers(min_value=0, max_value=len(_valid_npy()) - 1))
def test_truncated_npy(tmp_path_factory, cut):
    p = tmp_path_factory.mktemp("fz") / "c.npy"
    p.write_bytes(_valid_npy()[:cut])
    _open_must_be_clean(p)


@SETTINGS
@given(shape=st.lists(st.integers(min_value=0, max_value=5), min_size=0, max_size=5),
       dtype=st.sampled_from(["float32", "int16", "complex64", "bool", "U3"]))
def test_wrong_shapes_and_types_npy(tmp_path_factory, shape, dtype):
    d = tmp_path_factory.mktemp("fz")
    p = d / "c.npy"
    np.save(p, np.zeros(shape, dtype=dtype))
    n = shape[-1] if shape else 1
    (d / "c.axes.json").write_text(json.dumps({"pmap_axes": 1,
                                               "wavelength_nm": list(range(500, 500 + n))}))
    _open_must_be_clean(p)


@SETTINGS
@given(rows=st.lists(st.lists(st.one_of(st.floats(allow_nan=True, allow_infinity=True),
                                        st.text(max_size=4)), min_size=0, max_size=5),
                     max_size=12))
def test_text_tables(tmp_path_factory, rows):
    p = tmp_path_factory.mktemp("fz") / "t.csv"
    p.write_text("\n".join(",".join(str(v) for v in r) for r in rows))
    _open_must_be_clean(p)


@pytest.mark.parametrize("header", ["x,y,wavelength,intensity", "x,y,500,501,502"])
def test_text_header_only(tmp_path, header):
    p = tmp_path / "t.csv"
    p.write_text(header + "\n")
    _open_must_be_clean(p)
