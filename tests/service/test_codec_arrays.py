"""Stored held-out arrays are read back as ``numpy.load`` reads them (numpy as the reference)."""

from __future__ import annotations

import io

import numpy as np
import pytest

from service.store.codec import _npz

ARRAYS = {"floats": np.array([0.25, np.nan, -1.0]), "bools": np.array([True, False]), "empty": np.zeros(0),
          "int8_matrix": np.arange(6, dtype=np.int8).reshape(2, 3), "scalar": np.array(3.5),
          "bytes": np.frombuffer(b"[{}]", dtype=np.uint8), "text": np.array(["x", "yy"]),
          "fortran": np.asfortranarray(np.ones((2, 3))), "big_endian": np.arange(3, dtype=">f4"),
          "long": np.random.default_rng(0).random(5000)}


@pytest.mark.parametrize("compressed", [True, False])
def test_every_array_equals_numpy_load(compressed):
    buffer = io.BytesIO()
    (np.savez_compressed if compressed else np.savez)(buffer, **ARRAYS)
    found = _npz(buffer.getvalue())
    with np.load(io.BytesIO(buffer.getvalue()), allow_pickle=False) as archive:
        assert sorted(found) == sorted(archive.files)
        for name in archive.files:
            expected = archive[name]
            got = found[name]
            assert got.dtype == expected.dtype and got.shape == expected.shape, name
            assert expected.tobytes() == got.tobytes(), name
            assert got.flags.writeable, name


def test_object_arrays_are_refused():
    buffer = io.BytesIO()
    np.savez(buffer, objects=np.array([{"a": 1}], dtype=object))
    with pytest.raises(ValueError):
        _npz(buffer.getvalue())
