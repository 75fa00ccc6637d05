"""Counts at many ranks (run as ``mpiexec -n P python tests/mpi_many_ranks.py``).

tests/test_cli_mpi_refined.py runs this with 16 ranks, oversubscribed on the
machine's cores, under a timeout: the partitioned solve of a fixed global
problem must keep the serial multigrid's iteration count, and no rank may
hold more than a share of the fine points that falls with the ranks (a
replicated fine mesh would put all of them on every rank).  Counts only,
never times.  Rank 0 prints one JSON line with the figures, then
``mpi_many_ranks: ok on P ranks``.  A failure on any rank aborts every rank.

Nothing runs on import (pytest's doctest collection imports this file).
"""

import json
import sys
import warnings

import mpi_checks


def main():
    from mpi4py import MPI

    mpi_checks._install_abort_hook(MPI)
    warnings.simplefilter("error", RuntimeWarning)

    import hatkernels
    from hatkernels import distributed
    from hatkernels.mesh import rectangle

    comm = MPI.COMM_WORLD
    size = comm.Get_size()
    coarse, k = rectangle(8, 8), 4
    dist = distributed.solve_poisson(coarse, 1.0, refine=k, comm=comm, gather=False,
                                     rtol=1e-8)
    serial = None
    if comm.Get_rank() == 0:
        fine = coarse
        for _ in range(k):
            fine = fine.refine()
        serial = hatkernels.solve_poisson(fine, 1.0, preconditioner="gmg", rtol=1e-8)
    mpi_checks._wait_politely(comm)
    iterations = comm.bcast(None if serial is None else serial.stats.iterations)
    st = dist.stats
    n_fine = st.unknowns + st.dirichlet_points
    bal = st.distribution.balance
    local = [b["levels_points"][-1] for b in bal]
    if comm.Get_rank() == 0:
        print(json.dumps({"ranks": size, "fine_points": n_fine, "iterations": st.iterations,
                          "serial_iterations": iterations, "largest_local_points": max(local),
                          "peak_rss_bytes": [b["peak_rss_bytes"] for b in bal]}), flush=True)
    assert st.distribution.path == "partitioned"
    # the serial multigrid's count, within one (the target; common practice)
    assert abs(st.iterations - iterations) <= 1, (st.iterations, iterations)
    # owned points plus one ghost layer: about n/P plus a perimeter; a replicated fine mesh
    # would hold all n on every rank
    assert max(local) <= 2.0 * n_fine / size + 8 * n_fine ** 0.5, (max(local), n_fine)
    assert sum(b["owned_points"] for b in bal) == n_fine  # each point owned once
    if comm.Get_rank() == 0:
        print(f"mpi_many_ranks: ok on {size} ranks", flush=True)


if __name__ == "__main__":
    sys.exit(main())
