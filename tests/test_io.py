"""Reading meshes, writing results: round trips, named errors, whole files or nothing."""

import json
import os

import numpy as np
import pytest

import hatkernels
from hatkernels import io as kio
from hatkernels.errors import InputError, MeshError, MeshWarning


def _listing(directory):
    return sorted(os.listdir(directory))


@pytest.fixture
def mesh():
    return hatkernels.mesh.l_shape(3)


# -- npz ------------------------------------------------------------------------


def test_npz_round_trip(tmp_path, mesh):
    u = np.sin(mesh.points[:, 0]) + mesh.points[:, 1] ** 2
    q = np.arange(mesh.n_triangles, dtype=float)
    meta = {"generator": "hatkernels test", "units": {"length": "m"}, "values": [1.5, 2]}
    path = kio.write_solution(tmp_path / "s.npz", mesh, {"u": u}, meta, cell_data={"q": q})
    sol = kio.read_solution(path)
    assert np.array_equal(sol.mesh.points, mesh.points)
    assert np.array_equal(sol.mesh.triangles, mesh.triangles)
    assert np.array_equal(sol.point_data["u"], u)  # bit for bit
    assert np.array_equal(sol.cell_data["q"], q)
    assert sol.metadata == meta
    # plain numpy reads it without pickles
    with np.load(path, allow_pickle=False) as archive:
        assert json.loads(str(archive["metadata"])) == meta
        assert np.array_equal(archive["u"], u) and np.array_equal(archive["q"], q)
    assert _listing(tmp_path) == ["s.npz"]


def test_read_mesh_npz(tmp_path, mesh):
    np.savez(tmp_path / "m.npz", points=mesh.points, triangles=mesh.triangles)
    m = kio.read_mesh(tmp_path / "m.npz")
    assert np.array_equal(m.points, mesh.points) and np.array_equal(m.triangles, mesh.triangles)


def test_read_mesh_does_not_modify_the_file(tmp_path, mesh):
    clockwise = mesh.triangles[:, ::-1].copy()
    np.savez(tmp_path / "m.npz", points=mesh.points, triangles=clockwise)
    before = (tmp_path / "m.npz").read_bytes()
    with pytest.warns(MeshWarning, match="m.npz.*clockwise"):
        m = kio.read_mesh(tmp_path / "m.npz")
    assert (m.areas() > 0).all()
    assert (tmp_path / "m.npz").read_bytes() == before


@pytest.mark.parametrize(
    "make, match",
    [
        (lambda p: None, "not found"),
        (lambda p: p.write_bytes(b"not an archive\n"), "not an .npz archive"),
        (lambda p: p.write_bytes(b"PK\x03\x04 truncated zip"), "not a readable .npz"),
        (lambda p: np.save(open(p, "wb"), np.zeros(3)), "not an .npz archive"),
        (lambda p: np.savez(p, points=np.zeros((3, 2))), "no array 'triangles'"),
        (lambda p: np.savez(p, points=np.zeros((3, 2)), triangles=np.array([["a", "b", "c"]])),
         "integer array"),
    ],
    ids=["missing", "text", "bad-zip", "npy", "no-triangles", "string-triangles"],
)
def test_read_mesh_bad_files(tmp_path, make, match):
    path = tmp_path / "bad.npz"
    make(path)
    with pytest.raises(InputError, match=match) as info:
        kio.read_mesh(path)
    assert "bad.npz" in str(info.value)  # the message names the file


def test_read_mesh_nan_names_the_point(tmp_path):
    points = np.array([[0.0, 0.0], [1.0, 0.0], [0.0, 1.0], [np.nan, 1.0]])
    np.savez(tmp_path / "nan.npz", points=points, triangles=np.array([[0, 1, 2], [1, 3, 2]]))
    with pytest.raises(MeshError, match=r"nan.npz: point 3 has a non-finite coordinate"):
        kio.read_mesh(tmp_path / "nan.npz")


def test_fields_of_the_wrong_length_are_refused(tmp_path, mesh):
    with pytest.raises(InputError, match="point array 'u' has shape"):
        kio.write_solution(tmp_path / "s.npz", mesh, {"u": np.zeros(mesh.n_points + 1)})
    with pytest.raises(InputError, match="reserved"):
        kio.write_solution(tmp_path / "s.npz", mesh, {"points": np.zeros(mesh.n_points)})
    assert _listing(tmp_path) == []


def test_plain_npz_with_fields_is_read_by_length(tmp_path, mesh):
    np.savez(tmp_path / "p.npz", points=mesh.points, triangles=mesh.triangles,
             T=np.ones(mesh.n_points), k=np.ones(mesh.n_triangles))
    sol = kio.read_solution(tmp_path / "p.npz")
    assert list(sol.point_data) == ["T"] and list(sol.cell_data) == ["k"]
    assert sol.metadata == {}


# -- atomic writes ------------------------------------------------------------------


def test_atomic_file_leaves_nothing_on_failure(tmp_path):
    target = tmp_path / "out.bin"
    with pytest.raises(RuntimeError, match="disk on fire"):
        with kio.atomic_file(target) as tmp:
            with open(tmp, "wb") as f:
                f.write(b"half")
            raise RuntimeError("disk on fire")
    assert _listing(tmp_path) == []


def test_atomic_file_keeps_the_old_file_on_failure(tmp_path):
    target = tmp_path / "out.txt"
    target.write_text("old")
    with pytest.raises(KeyboardInterrupt):
        with kio.atomic_file(target) as tmp:
            open(tmp, "w").write("new but incomplete")
            raise KeyboardInterrupt
    assert target.read_text() == "old"
    assert _listing(tmp_path) == ["out.txt"]


def test_write_solution_with_nan_metadata_writes_nothing(tmp_path, mesh):
    with pytest.raises(ValueError):
        kio.write_solution(tmp_path / "s.npz", mesh, {"u": np.zeros(mesh.n_points)},
                           {"x": float("nan")})
    assert _listing(tmp_path) == []


def test_output_directory_whole_or_nothing(tmp_path):
    out = tmp_path / "out"
    with pytest.raises(RuntimeError):
        with kio.output_directory(out) as tmp:
            (open(os.path.join(tmp, "a.txt"), "w")).write("partial")
            raise RuntimeError("failed half way")
    assert _listing(tmp_path) == []
    with kio.output_directory(out) as tmp:
        kio.write_json(os.path.join(tmp, "summary.json"), {"generator": "hatkernels test"})
    assert _listing(tmp_path) == ["out"]
    assert _listing(out) == ["summary.json"]


def test_output_directory_refuses_existing_without_force(tmp_path):
    out = tmp_path / "out"
    out.mkdir()
    (out / "summary.json").write_text(json.dumps({"generator": "hatkernels 0"}))
    with pytest.raises(kio.OutputError, match="exists; use --force"):
        with kio.output_directory(out):
            pass
    assert _listing(out) == ["summary.json"]
    assert _listing(tmp_path) == ["out"]


def test_output_directory_force_replaces_our_output(tmp_path):
    out = tmp_path / "out"
    out.mkdir()
    (out / "summary.json").write_text(json.dumps({"generator": "hatkernels 0"}))
    (out / "stale.png").write_bytes(b"old")
    with kio.output_directory(out, force=True) as tmp:
        kio.write_json(os.path.join(tmp, "summary.json"), {"generator": "hatkernels 1"})
    assert _listing(out) == ["summary.json"]
    assert json.loads((out / "summary.json").read_text())["generator"] == "hatkernels 1"
    assert _listing(tmp_path) == ["out"]  # no temporary or old directory left


def test_output_directory_force_never_replaces_other_directories(tmp_path):
    out = tmp_path / "home"
    out.mkdir()
    (out / "thesis.tex").write_text("precious")
    with pytest.raises(kio.OutputError, match="does not look like hatkernels output"):
        with kio.output_directory(out, force=True):
            pass
    assert (out / "thesis.tex").read_text() == "precious"


def test_output_directory_missing_parent(tmp_path):
    with pytest.raises(kio.OutputError, match="does not exist"):
        kio.check_output_directory(tmp_path / "no" / "such")


def test_output_directory_file_in_the_way(tmp_path):
    (tmp_path / "f").write_text("x")
    with pytest.raises(kio.OutputError, match="not a directory"):
        kio.check_output_directory(tmp_path / "f", force=True)


def test_writers_leave_their_inputs_unchanged(tmp_path, mesh):
    # inputs are never modified (the project's rule): arrays and metadata compared
    # with copies taken before the call
    u = np.sin(mesh.points[:, 0])
    q = np.arange(mesh.n_triangles, dtype=np.float32)  # converted on the way, not in place
    meta = {"values": [1.5, 2], "units": {"length": "m"}}
    points, cells = mesh.points.copy(), mesh.triangles.copy()
    before = (u.copy(), q.copy(), json.loads(json.dumps(meta)))
    kio.write_solution(tmp_path / "s.npz", mesh, {"u": u}, meta, cell_data={"q": q})
    kio.write_json(tmp_path / "m.json", meta)
    if kio.meshio_available():
        kio.write_vtu(tmp_path / "s.vtu", mesh, {"u": u}, {"q": q})
    assert np.array_equal(u, before[0]) and np.array_equal(q, before[1]) and q.dtype == np.float32
    assert meta == before[2]
    assert np.array_equal(mesh.points, points) and np.array_equal(mesh.triangles, cells)


def test_without_meshio_vtu_is_refused_and_npz_still_works(tmp_path, mesh, monkeypatch):
    import hatkernels.meshfiles

    for module in (kio, hatkernels.meshfiles):  # writers live in one, mesh readers in the other
        monkeypatch.setattr(module, "meshio_available", lambda: False)
    with pytest.raises(InputError, match=r"writing .vtu needs meshio; install the io extra"):
        kio.write_vtu(tmp_path / "s.vtu", mesh, {"u": np.zeros(mesh.n_points)})
    (tmp_path / "m.vtu").write_text("<VTKFile/>")
    with pytest.raises(InputError, match=r"m.vtu: only .npz meshes can be read without meshio"):
        kio.read_mesh(tmp_path / "m.vtu")
    assert _listing(tmp_path) == ["m.vtu"]
    kio.write_solution(tmp_path / "s.npz", mesh, {"u": np.zeros(mesh.n_points)})
    assert np.array_equal(kio.read_mesh(tmp_path / "s.npz").triangles, mesh.triangles)


# -- meshio -----------------------------------------------------------------------


@pytest.fixture
def meshio():
    """The meshio module; only the tests that use it are skipped without it."""
    return pytest.importorskip("meshio", reason="meshio (the io extra) is not installed")


def test_vtu_round_trip_through_meshio(tmp_path, mesh, meshio):
    u = mesh.points[:, 0] * 2 - mesh.points[:, 1]
    q = np.linspace(0, 1, mesh.n_triangles)
    kio.write_vtu(tmp_path / "s.vtu", mesh, {"u": u}, {"q": q})
    back = meshio.read(tmp_path / "s.vtu")
    assert np.array_equal(back.points[:, :2], mesh.points)
    assert np.array_equal(back.cells_dict["triangle"], mesh.triangles)
    assert np.array_equal(back.point_data["u"], u)  # bit for bit
    assert np.array_equal(back.cell_data["q"][0], q)
    # and our reader takes the meshio file as a mesh
    m = kio.read_mesh(tmp_path / "s.vtu")
    assert np.array_equal(m.triangles, mesh.triangles)
    assert _listing(tmp_path) == ["s.vtu"]


def test_meshio_mesh_with_lines_and_vertices(tmp_path, mesh, meshio):
    edges = mesh.boundary_edges()
    points = np.column_stack([mesh.points, np.full(mesh.n_points, 0.5)])  # constant z
    m = meshio.Mesh(points, [("vertex", np.array([[0]])), ("line", edges),
                             ("triangle", mesh.triangles)])
    meshio.write(tmp_path / "m.vtu", m)
    back = kio.read_mesh(tmp_path / "m.vtu")
    assert np.array_equal(back.triangles, mesh.triangles)


def test_meshio_errors(tmp_path, mesh, meshio):
    (tmp_path / "x.msh").write_text("this is no mesh")
    with pytest.raises(InputError, match="x.msh: meshio cannot read it"):
        kio.read_mesh(tmp_path / "x.msh")
    p3 = np.column_stack([mesh.points, mesh.points[:, 0]])  # not flat
    meshio.write(tmp_path / "curved.vtu", meshio.Mesh(p3, [("triangle", mesh.triangles)]))
    with pytest.raises(InputError, match="not a plane mesh"):
        kio.read_mesh(tmp_path / "curved.vtu")
    quad = meshio.Mesh(np.array([[0, 0, 0], [1, 0, 0], [1, 1, 0], [0, 1, 0.0]]),
                       [("quad", np.array([[0, 1, 2, 3]]))])
    meshio.write(tmp_path / "quad.vtu", quad)
    with pytest.raises(InputError, match="quad cells"):
        kio.read_mesh(tmp_path / "quad.vtu")
