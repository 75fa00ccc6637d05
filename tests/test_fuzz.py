"""Random bad input: every case works or raises the library's own error, naming the problem.

Never a crash inside numba, a numpy error, a hang or a silent wrong answer
(common practice for input validation, no source).
"""

import warnings

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra import numpy as hnp

import hatkernels
from hatkernels.mesh import rectangle

BASE = rectangle(3, 3)

dtypes = st.sampled_from([np.float64, np.float32, np.float16, np.int64, np.int32, np.uint8,
                          np.bool_, np.complex128, object])
special = st.sampled_from([np.nan, np.inf, -np.inf, 0.0, -1.0, 1e300, -1e-300, 1e308])


def arrays_near(shape, dtype):
    """Arrays of ``dtype`` with shape near ``shape`` (ragged lists and 0-d included)."""
    shapes = st.one_of(st.just(shape), hnp.array_shapes(min_dims=0, max_dims=3, max_side=5))
    return st.one_of(
        shapes.flatmap(lambda s: hnp.arrays(dtype, s, elements=_elements(dtype))),
        st.lists(st.lists(st.integers(-2, 20), max_size=4), max_size=4),  # ragged
    )


def _elements(dtype):
    kind = np.dtype(dtype).kind
    if kind == "f":
        return st.floats(allow_nan=True, allow_infinity=True, width=np.dtype(dtype).itemsize * 8)
    if kind in "iu":
        return st.integers(int(np.iinfo(dtype).min) if kind == "i" else 0, 20)
    if kind == "b":
        return st.booleans()
    if kind == "c":
        return st.complex_numbers(allow_nan=False, allow_infinity=False, max_magnitude=1e3)
    return st.sampled_from([1, "a", None, 2.5])


def accepted_or_named(call):
    """Run ``call``: it returns, or raises one of the library's errors with a message."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", hatkernels.MeshWarning)
        try:
            return call()
        except hatkernels.InputError as exc:  # MeshError is one
            assert str(exc), "an error without a message"
            return exc


@given(st.data())
@settings(deadline=None)
def test_mesh_takes_any_arrays(data):
    pdt = data.draw(dtypes)
    tdt = data.draw(dtypes)
    points = data.draw(arrays_near((BASE.n_points, 2), pdt))
    cells = data.draw(arrays_near((BASE.n_cells, 3), tdt))
    out = accepted_or_named(lambda: hatkernels.Mesh(points, cells))
    if isinstance(out, hatkernels.Mesh):
        assert np.isfinite(out.points).all() and (out.measures() > 0).all()


@given(st.data())
@settings(deadline=None)
def test_mesh_with_one_bad_value(data):
    points = BASE.points.copy()
    cells = BASE.cells.astype(np.int64)
    if data.draw(st.booleans()):
        i, j = data.draw(st.integers(0, len(points) - 1)), data.draw(st.integers(0, 1))
        points[i, j] = data.draw(special)
    else:
        i, j = data.draw(st.integers(0, len(cells) - 1)), data.draw(st.integers(0, 2))
        cells[i, j] = data.draw(st.sampled_from([-1, len(points), 2**40, cells[i, (j + 1) % 3]]))
    before = (points.copy(), cells.copy())
    out = accepted_or_named(lambda: hatkernels.Mesh(points, cells))
    assert np.array_equal(points, before[0], equal_nan=True) and np.array_equal(cells, before[1])
    if isinstance(out, hatkernels.MeshError):
        assert any(w in str(out) for w in ("point", "triangle")), str(out)


def _bad_datum(data, n_points, n_cells):
    kind = data.draw(st.sampled_from(["number", "array", "callable", "tuple", "bool", "text"]))
    if kind == "number":
        return data.draw(special)
    if kind == "array":
        n = data.draw(st.sampled_from([n_points, n_cells, n_points + 1, 0, 3]))
        dt = data.draw(dtypes)
        return data.draw(hnp.arrays(dt, (n,), elements=_elements(dt)))
    if kind == "callable":
        value = data.draw(special)
        return lambda x, y: np.full_like(x, value)
    if kind == "tuple":
        return (data.draw(special),) * data.draw(st.integers(1, 4))
    if kind == "bool":
        return data.draw(st.booleans())
    return "1.0"


@pytest.mark.parametrize("argument", ["f", "coefficient", "reaction", "dirichlet", "neumann",
                                      "robin", "dirichlet_on"])
@given(data=st.data())
@settings(deadline=None, max_examples=15)
def test_solve_poisson_takes_any_datum(argument, data):
    value = _bad_datum(data, BASE.n_points, BASE.n_cells)
    kwargs = {argument: value}
    if argument in ("neumann", "robin"):
        kwargs["dirichlet_on"] = [0]
    copy = value.copy() if isinstance(value, np.ndarray) else None
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)  # a non-converged solve warns
        out = accepted_or_named(lambda: hatkernels.solve_poisson(BASE, **kwargs))
    if copy is not None:
        assert np.array_equal(value, copy, equal_nan=value.dtype.kind in "fc")  # never modified
    if isinstance(out, hatkernels.PoissonSolution) and out.converged:
        assert np.isfinite(out.u).all()
