"""Figures are valid PNGs of the promised size, written whole or not at all."""

import os
import struct
import subprocess
import sys

import numpy as np
import pytest

import hatkernels
from hatkernels import plot
from hatkernels.errors import InputError

#: The drawing tests need matplotlib (the plot extra); the refusal without it does not.
needs_matplotlib = pytest.mark.skipif(
    not plot.available(), reason="matplotlib (the plot extra) is not installed"
)

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"


def png_size(path):
    """Width and height from the IHDR chunk (the PNG specification, W3C/ISO 15948, 2003)."""
    with open(path, "rb") as f:
        head = f.read(24)
    assert head[:8] == PNG_SIGNATURE, "not a PNG file"
    length, kind = struct.unpack(">I4s", head[8:16])
    assert kind == b"IHDR" and length == 13
    return struct.unpack(">II", head[16:24])


EXPECTED = (int(plot.SIZE[0] * plot.DPI), int(plot.SIZE[1] * plot.DPI))


@needs_matplotlib
def test_solution_figure(tmp_path):
    mesh = hatkernels.mesh.rectangle(12, 8, bounds=(0, 0.12, 0, 0.08))
    u = 25 + np.sin(mesh.points[:, 0] * 30)
    path = plot.solution_figure(mesh, u, tmp_path / "s.png", title="t", label="T (degC)",
                                length_scale=1e3, length_unit="mm",
                                outlines=[("chip", (0.03, 0.05, 0.035, 0.055))])
    assert png_size(path) == EXPECTED
    assert os.listdir(tmp_path) == ["s.png"]


@needs_matplotlib
def test_solution_figure_of_a_constant_field(tmp_path):
    mesh = hatkernels.mesh.l_shape(2)
    path = plot.solution_figure(mesh, np.full(mesh.n_points, 3.0), tmp_path / "c.png")
    assert png_size(path) == EXPECTED


@needs_matplotlib
def test_residuals_and_convergence_figures(tmp_path):
    r = 10.0 ** -np.arange(8.0)
    assert png_size(plot.residuals_figure(r, tmp_path / "r.png", rtol=1e-6)) == EXPECTED
    h = np.array([0.1, 0.05, 0.025])
    errors = {"L2": 0.3 * h**2, "H1": 2 * h}
    assert png_size(plot.convergence_figure(h, errors, tmp_path / "c.png")) == EXPECTED


@needs_matplotlib
def test_custom_size(tmp_path):
    path = plot.residuals_figure([1.0, 0.1], tmp_path / "r.png", size=(4, 3), dpi=50)
    assert png_size(path) == (200, 150)


@needs_matplotlib
def test_non_finite_values_write_nothing(tmp_path):
    mesh = hatkernels.mesh.rectangle(2, 2)
    u = np.zeros(mesh.n_points)
    u[4] = np.nan
    with pytest.raises(InputError, match=r"u\[4\] = nan"):
        plot.solution_figure(mesh, u, tmp_path / "s.png")
    with pytest.raises(InputError, match="shape"):
        plot.solution_figure(mesh, np.zeros(3), tmp_path / "s.png")
    with pytest.raises(InputError, match=r"errors\['L2'\] has shape"):
        plot.convergence_figure([1.0, 0.5], {"L2": [1.0]}, tmp_path / "c.png")
    assert os.listdir(tmp_path) == []


@needs_matplotlib
def test_no_pyplot_and_no_display_needed(tmp_path):
    # Agg canvas directly: pyplot (and its backend choice) is never imported
    code = (
        "import sys, numpy as np; from hatkernels import plot;"
        f"plot.residuals_figure(np.array([1.0, 0.1]), {str(tmp_path / 'r.png')!r});"
        "print('matplotlib.pyplot' in sys.modules)"
    )
    env = {k: v for k, v in os.environ.items() if k not in ("DISPLAY", "MPLBACKEND")}
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         env=env, check=True)
    assert out.stdout.strip() == "False"
    assert png_size(tmp_path / "r.png") == EXPECTED


@pytest.fixture
def without_matplotlib(monkeypatch):
    """matplotlib made unimportable for one test (None in sys.modules stops an import)."""
    names = [k for k in sys.modules if k == "matplotlib" or k.startswith("matplotlib.")]
    for name in set(names) | {"matplotlib", "matplotlib.figure", "matplotlib.backends",
                              "matplotlib.backends.backend_agg", "matplotlib.patches",
                              "matplotlib.ticker", "matplotlib.tri"}:
        monkeypatch.setitem(sys.modules, name, None)
    assert not plot.available()


INSTALL_HINT = r"figures need matplotlib; install the plot extra"


def test_without_matplotlib_figures_are_refused_with_the_fix(tmp_path, without_matplotlib):
    with pytest.raises(InputError, match=INSTALL_HINT):
        plot.residuals_figure([1.0, 0.1], tmp_path / "r.png")
    with pytest.raises(InputError, match=INSTALL_HINT):
        plot.convergence_figure([0.1, 0.05], {"L2": [1.0, 0.25]}, tmp_path / "c.png")
    # bad values are named before matplotlib is needed
    with pytest.raises(InputError, match=r"residuals\[1\] = nan"):
        plot.residuals_figure([1.0, np.nan], tmp_path / "r.png")
    with pytest.raises(InputError, match="h needs at least two mesh sizes"):
        plot.convergence_figure([0.1], {"L2": [1.0]}, tmp_path / "c.png")
    assert os.listdir(tmp_path) == []


def test_without_matplotlib_solution_figure_is_refused_with_the_fix(tmp_path,
                                                                   without_matplotlib):
    mesh = hatkernels.mesh.rectangle(2, 2)
    with pytest.raises(InputError, match=INSTALL_HINT):
        plot.solution_figure(mesh, np.zeros(mesh.n_points), tmp_path / "s.png")
    assert os.listdir(tmp_path) == []
