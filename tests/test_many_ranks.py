"""The partitioned multigrid at 16 ranks (oversubscribed here): counts only, not times.

See tests/mpi_many_ranks.py for what is checked; the figures it prints (local
points and peak memory per rank) are shown with ``pytest -s``.
"""

import sys
from pathlib import Path

from test_distributed import needs_mpi, run_mpi


@needs_mpi
def test_sixteen_ranks_keep_the_serial_iterations_and_split_the_points():
    script = Path(__file__).resolve().parent / "mpi_many_ranks.py"
    code, out, err = run_mpi(16, [sys.executable, str(script)])
    print(out)
    assert code == 0, f"exit {code}\n{out}\n{err}"
    assert "mpi_many_ranks: ok on 16 ranks" in out
