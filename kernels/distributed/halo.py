"""Halo exchange: refresh the ghost entries of a local vector from their owners.

A local vector holds the owned entries first, then the ghosts grouped by
owning neighbour.  :class:`HaloPattern` says which owned entries go to each
neighbour and where each neighbour's values land; it is plain data (built
from a :class:`~hatkernels.distributed.Subdomain`, restricted to the unknowns
after Dirichlet reduction), testable without MPI.

:class:`Halo` does the exchange with mpi4py's buffer interface (``Isend`` /
``Irecv`` on float64 numpy arrays: no pickling).  Send buffers are
allocated once; receives go straight into the ghost slice of the vector
(contiguous per neighbour).  ``start`` posts everything and returns;
``finish`` waits, so a caller can compute on owned data in between.
"""

from __future__ import annotations

import dataclasses
import time

import numpy as np

from hatkernels.distributed.launch import mpi
from hatkernels.errors import InputError

__all__ = ["HaloPattern", "Halo", "CommStats"]

#: Message tag of halo traffic (on the solver's own duplicated communicator).
HALO_TAG = 71


@dataclasses.dataclass
class CommStats:
    """Communication counters of one rank (seconds include waiting for other ranks)."""

    halo_seconds: float = 0.0
    halo_exchanges: int = 0
    halo_messages: int = 0
    halo_bytes_sent: int = 0
    reduction_seconds: float = 0.0
    reductions: int = 0
    reduction_bytes: int = 0
    coarse_seconds: float = 0.0
    coarse_applications: int = 0
    coarse_bytes: int = 0

    @property
    def seconds(self):
        return self.halo_seconds + self.reduction_seconds + self.coarse_seconds

    def as_dict(self):
        d = dataclasses.asdict(self)
        d["seconds"] = self.seconds
        return d


@dataclasses.dataclass(frozen=True, repr=False)
class HaloPattern:
    """Who sends what to whom, in one rank's local numbering.

    Attributes
    ----------
    n_owned, n_ghosts : int
    neighbours : ndarray
        Ranks exchanged with, ascending.
    recv_offsets : ndarray, shape (len(neighbours) + 1,)
        Ghost entries ``n_owned + recv_offsets[k] : n_owned + recv_offsets[k+1]``
        come from ``neighbours[k]``.
    send : tuple of ndarray
        Owned entries sent to ``neighbours[k]``, in the order it stores them.
    """

    n_owned: int
    n_ghosts: int
    neighbours: np.ndarray
    recv_offsets: np.ndarray
    send: tuple

    @classmethod
    def from_subdomain(cls, sub):
        return cls(sub.n_owned, sub.n_ghosts, sub.neighbours, sub.recv_offsets, sub.send)

    def restrict(self, keep):
        """The pattern on the entries where ``keep`` (length n_owned + n_ghosts) is True.

        Kept entries are renumbered in order, so owned entries stay first and
        each neighbour's ghosts stay contiguous.  Both ends of every message
        apply the same rule to the same points, so the patterns stay matched.
        Neighbours left with nothing to exchange are dropped.
        """
        keep = np.asarray(keep, dtype=bool)
        if keep.shape != (self.n_owned + self.n_ghosts,):
            raise InputError(f"keep must have {self.n_owned + self.n_ghosts} entries, "
                             f"got shape {keep.shape}")
        new = np.cumsum(keep) - 1
        n_owned = int(keep[: self.n_owned].sum())
        ghost_keep = keep[self.n_owned:]
        kept_before = np.concatenate([[0], np.cumsum(ghost_keep, dtype=np.int64)])
        counts = kept_before[self.recv_offsets[1:]] - kept_before[self.recv_offsets[:-1]]
        send = [new[s[keep[s]]].astype(s.dtype) for s in self.send]
        active = [k for k in range(len(self.neighbours)) if counts[k] > 0 or send[k].size > 0]
        offsets = np.zeros(len(active) + 1, dtype=np.int64)
        np.cumsum(counts[active], out=offsets[1:])
        return HaloPattern(n_owned, int(ghost_keep.sum()), self.neighbours[active].copy(),
                           offsets, tuple(send[k] for k in active))

    @property
    def recv_counts(self):
        return np.diff(self.recv_offsets)

    @property
    def send_counts(self):
        return np.array([len(s) for s in self.send], dtype=np.int64)

    def __repr__(self):
        return (f"HaloPattern({self.n_owned} owned, {self.n_ghosts} ghosts from "
                f"{len(self.neighbours)} neighbours, sends {self.send_counts.tolist()})")


class Halo:
    """The exchange of a :class:`HaloPattern` over an mpi4py communicator.

    ``stats`` (a :class:`CommStats`) accumulates time, messages and bytes.
    """

    def __init__(self, pattern, comm, stats=None):
        self.pattern = pattern
        self.comm = comm
        self.stats = CommStats() if stats is None else stats
        self._MPI = mpi()
        self._send_buffers = [np.empty(len(s)) for s in pattern.send]
        self._requests = []
        self._lo = pattern.n_owned + pattern.recv_offsets[:-1]
        self._hi = pattern.n_owned + pattern.recv_offsets[1:]

    @property
    def n_local(self):
        return self.pattern.n_owned + self.pattern.n_ghosts

    def start(self, x):
        """Post the receives into ``x``'s ghost slice and the sends of its owned entries."""
        if self._requests:
            raise RuntimeError("halo exchange started twice without finish()")
        t0 = time.perf_counter()
        MPI, comm, pat = self._MPI, self.comm, self.pattern
        requests = []
        for k, q in enumerate(pat.neighbours):
            if self._hi[k] > self._lo[k]:
                requests.append(comm.Irecv([x[self._lo[k]:self._hi[k]], MPI.DOUBLE],
                                           source=int(q), tag=HALO_TAG))
        sent = 0
        for k, q in enumerate(pat.neighbours):
            buf = self._send_buffers[k]
            if buf.size:
                np.take(x, pat.send[k], out=buf)
                requests.append(comm.Isend([buf, MPI.DOUBLE], dest=int(q), tag=HALO_TAG))
                sent += buf.nbytes
        self._requests = requests
        s = self.stats
        s.halo_messages += sum(1 for b in self._send_buffers if b.size)
        s.halo_bytes_sent += sent
        s.halo_seconds += time.perf_counter() - t0

    def finish(self):
        """Wait for the exchange started last; then ``x``'s ghosts are current."""
        t0 = time.perf_counter()
        if self._requests:
            self._MPI.Request.Waitall(self._requests)
        self._requests = []
        self.stats.halo_exchanges += 1
        self.stats.halo_seconds += time.perf_counter() - t0

    def exchange(self, x):
        """``start`` then ``finish``: fill ``x``'s ghost entries from their owners."""
        self.start(x)
        self.finish()
        return x

    def exchange_indices(self, owned_ids):
        """Send integer labels of the owned entries; return what arrives for the ghosts.

        A setup-time check that both ends of every message agree (the labels
        being global numbers): int64, not on the hot path.
        """
        MPI, comm, pat = self._MPI, self.comm, self.pattern
        out = np.full(pat.n_ghosts, -1, dtype=np.int64)
        requests = []
        bufs = []
        for k, q in enumerate(pat.neighbours):
            lo, hi = pat.recv_offsets[k], pat.recv_offsets[k + 1]
            if hi > lo:
                requests.append(comm.Irecv([out[lo:hi], MPI.INT64_T], source=int(q),
                                           tag=HALO_TAG + 1))
        for k, q in enumerate(pat.neighbours):
            if len(pat.send[k]):
                buf = np.ascontiguousarray(owned_ids[pat.send[k]], dtype=np.int64)
                bufs.append(buf)
                requests.append(comm.Isend([buf, MPI.INT64_T], dest=int(q), tag=HALO_TAG + 1))
        MPI.Request.Waitall(requests)
        return out
