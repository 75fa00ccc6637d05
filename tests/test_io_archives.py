"""The solution reader (hatkernels.io.read_solution) given bad archives.

Each bad archive is made here from a good one written by write_solution, by
hand with numpy or by cutting bytes; the reader must refuse it with an
InputError (or MeshError, both ValueErrors) whose message names the file and
the problem, never a numpy, zipfile or zlib error, never a Solution.
"""

import json
import os
import zipfile

import numpy as np
import pytest

from hatkernels import io as kio
from hatkernels.errors import InputError, MeshError
from hatkernels.mesh import rectangle

MESH = rectangle(2, 2)  # 9 points, 8 triangles


def good_arrays():
    """What write_solution puts in an archive, as plain arrays to spoil one at a time."""
    return {
        "points": MESH.points,
        "triangles": MESH.triangles,
        "u": np.arange(9.0),
        "source": np.ones(8),
        "metadata": np.array(json.dumps({"note": "test"})),
        "fields": np.array(json.dumps({"u": "point", "source": "cell"})),
    }


def write(path, arrays):
    np.savez(path, **arrays)
    return path


def refused(path, *words, error=InputError):
    with pytest.raises(error) as info:
        kio.read_solution(path)
    text = str(info.value)
    assert str(path) in text, text
    for w in words:
        assert w in text, text
    return text


def test_a_good_archive_reads_back(tmp_path):
    # the baseline every bad case below departs from
    path = kio.write_solution(tmp_path / "s.npz", MESH, {"u": np.arange(9.0)}, {"note": "test"},
                              cell_data={"source": np.ones(8)})
    sol = kio.read_solution(path)
    assert sol.point_data["u"].tolist() == list(range(9))
    assert sol.cell_data["source"].tolist() == [1.0] * 8
    assert sol.metadata == {"note": "test"}
    sol = kio.read_solution(write(tmp_path / "hand.npz", good_arrays()))
    assert set(sol.point_data) == {"u"} and set(sol.cell_data) == {"source"}


@pytest.mark.parametrize("key", ["points", "triangles"])
def test_missing_mesh_arrays(tmp_path, key):
    arrays = good_arrays()
    del arrays[key]
    refused(write(tmp_path / "s.npz", arrays), f"no array {key!r}", "it has:")


def test_an_empty_archive(tmp_path):
    refused(write(tmp_path / "s.npz", {}), "no array 'points'", "it has: nothing")


def test_fields_names_an_array_that_is_missing(tmp_path):
    arrays = good_arrays()
    del arrays["u"]
    refused(write(tmp_path / "s.npz", arrays), "'fields' names an array 'u'")


def test_fields_with_an_unknown_kind(tmp_path):
    arrays = good_arrays()
    arrays["fields"] = np.array(json.dumps({"u": "edge", "source": "cell"}))
    refused(write(tmp_path / "s.npz", arrays), "'u' is 'edge'")


WRONG_SHAPES = {
    "points-one-column": ("points", MESH.points[:, :1], MeshError, "points must have shape"),
    "triangles-two-columns": ("triangles", MESH.triangles[:, :2], MeshError,
                              "triangles must have shape"),
    "field-too-short": ("u", np.arange(5.0), InputError, "'u' has shape (5,)"),
    "cell-field-per-point": ("source", np.ones(9), InputError, "'source' has shape (9,)"),
    "field-a-scalar": ("u", np.array(1.0), InputError, "shape ()"),
}


@pytest.mark.parametrize("case", list(WRONG_SHAPES))
def test_wrong_shapes(tmp_path, case):
    key, value, error, words = WRONG_SHAPES[case]
    arrays = good_arrays()
    arrays[key] = value
    refused(write(tmp_path / "s.npz", arrays), words, error=error)


def test_a_field_matching_no_count_without_fields(tmp_path):
    arrays = good_arrays()
    del arrays["fields"]
    arrays["u"] = np.arange(7.0)
    refused(write(tmp_path / "s.npz", arrays), "'u' has 7 rows", "9 points and 8 cells")


WRONG_DTYPES = {
    "points-integer-text": ("points", MESH.points.astype(str), MeshError, "dtype <U"),
    "points-complex": ("points", MESH.points.astype(complex), MeshError, "complex128"),
    "triangles-float": ("triangles", MESH.triangles.astype(float), MeshError,
                        "integer array of point indices"),
    "field-text": ("u", np.array(["a"] * 9), InputError, "'u' must be a real numeric array"),
    "field-complex": ("u", np.arange(9) * 1j, InputError, "dtype complex128"),
    "metadata-a-number": ("metadata", np.array(3.0), InputError,
                          "'metadata' must be one JSON text"),
    "metadata-not-json": ("metadata", np.array("{oops"), InputError, "is not valid JSON"),
    "metadata-a-list": ("metadata", np.array("[1, 2]"), InputError, "must hold a JSON object"),
}


@pytest.mark.parametrize("case", list(WRONG_DTYPES))
def test_wrong_dtypes(tmp_path, case):
    key, value, error, words = WRONG_DTYPES[case]
    arrays = good_arrays()
    arrays[key] = value
    refused(write(tmp_path / "s.npz", arrays), words, error=error)


def test_an_object_array_is_refused_not_unpickled(tmp_path):
    arrays = good_arrays()
    arrays["u"] = np.array([{"x": 1}] * 9, dtype=object)  # savez pickles it
    refused(write(tmp_path / "s.npz", arrays), "cannot read array 'u'")


@pytest.mark.parametrize("keep", [0.9, 0.5, 0.1])
def test_truncated_files(tmp_path, keep):
    # a copy cut short, as an interrupted download or a full disk leaves it; the zip
    # directory is at the end of the file, so any cut loses it
    good = kio.write_solution(tmp_path / "good.npz", MESH, {"u": np.arange(9.0)})
    data = open(good, "rb").read()
    cut = tmp_path / "cut.npz"
    cut.write_bytes(data[: int(len(data) * keep)])
    refused(cut, "truncated or damaged")


def test_a_damaged_member(tmp_path):
    # the zip directory intact but the bytes of one compressed array spoiled: the reader
    # names that array (zlib or CRC error inside)
    good = kio.write_solution(tmp_path / "good.npz", MESH, {"u": np.linspace(0.0, 1.0, 9)})
    with zipfile.ZipFile(good) as z:
        info = z.getinfo("u.npy")
    data = bytearray(open(good, "rb").read())
    start = info.header_offset + 30 + len(info.filename) + len(info.extra)
    for k in range(start + 2, start + info.compress_size - 2):
        data[k] ^= 0xFF
    bad = tmp_path / "bad.npz"
    bad.write_bytes(bytes(data))
    refused(bad, "cannot read array 'u'", "truncated or damaged")


NOT_NPZ = {
    "text": b"points,triangles\n0,0\n",
    "empty": b"",
    "single-array": None,  # an .npy file renamed .npz
    "zip-of-text": None,  # a zip archive, but not of .npy arrays
}


@pytest.mark.parametrize("case", list(NOT_NPZ))
def test_files_that_are_not_npz(tmp_path, case):
    path = tmp_path / "s.npz"
    if case == "single-array":
        with open(path, "wb") as f:
            np.save(f, np.arange(3.0))
        words = "not an .npz archive"
    elif case == "zip-of-text":
        with zipfile.ZipFile(path, "w") as z:
            z.writestr("points.npy", "not an array")
        words = "member 'points' is not a .npy array"
    else:
        path.write_bytes(NOT_NPZ[case])
        words = "not an .npz archive"
    refused(path, words)


def test_a_missing_file_and_a_directory(tmp_path):
    refused(tmp_path / "none.npz", "not found")
    os.mkdir(tmp_path / "d.npz")
    refused(tmp_path / "d.npz", "is a directory")
