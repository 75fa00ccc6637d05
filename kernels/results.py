"""Results by region and by part of the boundary, and the balance that ties them together.

For a solution ``u`` of ``-div(kappa grad u) + c u = f`` (:func:`hatkernels.solve_poisson`)
:func:`balance` reports, for each region of the mesh (its cells' region tag), the
measure, the range and mean of ``u``, the source ``int f`` and the reaction
``int c u`` it absorbs, and, for each boundary tag (then the parts given
without a tag), its condition, measure, range and mean of ``u`` and the
*outflow* through it.  The sum of the sources equals what is absorbed plus what
flows out, up to the solver's residual: :attr:`Balance.imbalance`.

Sign and units.  ``outflow`` is positive when the quantity leaves the body
(``-kappa du/dn`` integrated over the part, ``n`` the outward normal).  For
heat (``u`` in K, ``kappa`` in W/(m K), ``f`` in W/m^3, a Robin film ``r`` in
W/(m^2 K)) every source, absorbed and outflow figure is in W per metre of
thickness on a 2-D mesh and in W on a 3-D one (metres throughout).

How the outflow is computed: conservatively, from the discrete equations, not
by differentiating ``u``.  With the full matrix ``A = K + M_c + R`` (stiffness
with the problem's ``kappa``, mass of the reaction ``c``, Robin mass of ``r``)
and the full load ``b`` (source, flux ``h`` and Robin ``s``), before any
Dirichlet reduction, the residual ``res = A u - b`` is the discrete flux
``int kappa du/dn phi_i`` through the held sides at a held point ``i`` and,
at a free point, what the solver left (about ``rtol`` times the load).  So

- through held sides: ``-sum res_i`` over the held points, each point's value
  split between the held parts whose sides touch it in proportion to
  ``int phi_i`` over each part's sides (half the length of each touching edge
  in 2-D, a third of the area of each touching face in 3-D); held points
  touching no held side (points held inside the body, single points) make one
  untagged entry;
- through a flux part (``kappa du/dn = h``): ``-int h``;
- through a convection part (``kappa du/dn + r u = s``): ``int r u - int s``,

each with the same closed forms or quadrature as the solve.  As the stiffness
rows sum to zero, ``sources - absorbed - outflow = -sum res_i`` over the free
points: the imbalance is bounded by the solver's residual (round-off when the
system is solved tightly), whatever the mesh size; it says the figures add up,
not that the mesh is fine enough.  For a ``zero_mean`` problem it also holds
what quadrature left unbalanced in the data (see :mod:`hatkernels.problem`; the
point the solve pins in such a part is not reported as held).

CAUTION: results are engineering estimates and must be checked by a qualified
person against local codes and licensed practice.
"""

from __future__ import annotations

import dataclasses

import numpy as np

from hatkernels.assembly import StiffnessAssembler, assemble_load
from hatkernels.assembly.boundary_terms import side_load, side_mass
from hatkernels.assembly.elements import load_values, tetrahedron_load_values
from hatkernels.coefficients import Coefficient, Pieces
from hatkernels.errors import InputError
from hatkernels.mesh.tags import _row_positions
from hatkernels.norms import _nodal
from hatkernels.problem import PoissonProblem, _pins

__all__ = ["Balance", "BoundaryResult", "RegionResult", "balance"]

CAUTION = ("CAUTION: results are engineering estimates and must be checked by a qualified "
           "person against local codes and licensed practice.")

#: The constant 1 on sides: ``side_load`` of it gives ``int phi_i`` over the sides.
_ONE = Coefficient("constant", 1.0, "measure", "any")

#: Entries for parts of the boundary given without a tag, in this order.
_UNTAGGED = {"held": "held points (untagged)", "flux": "flux sides (untagged)",
             "convection": "convection sides (untagged)"}


@dataclasses.dataclass(frozen=True)
class RegionResult:
    """One region of the mesh (see :func:`balance`).

    Attributes
    ----------
    tag : int or None
        The region tag; None when the mesh has no region tags (one entry for all cells).
    label : str
        ``mesh.tags.region_label(tag)``, or "all cells".
    cells : int
    measure : float
        Area (2-D) or volume (3-D).
    u_min, u_max, u_mean : float
        Over the region's points; the mean is ``int u / measure`` (exact for P1).
    source : float
        ``int f`` over the region: its share of the assembled load (callables by
        the problem's quadrature).
    absorbed : float
        ``int c u`` over the region (the reaction term), 0 without a reaction.
    """

    tag: int | None
    label: str
    cells: int
    measure: float
    u_min: float
    u_max: float
    u_mean: float
    source: float
    absorbed: float


@dataclasses.dataclass(frozen=True)
class BoundaryResult:
    """One part of the boundary (see :func:`balance`).

    Attributes
    ----------
    tag : int or None
        The boundary tag; None for sides or points given without a tag.
    label : str
        ``mesh.tags.side_label(tag)``, or "held points (untagged)", "flux sides
        (untagged)", "convection sides (untagged)".
    condition : str
        "held", "flux", "convection", or "insulated" (a tag with no condition:
        zero flux).  A tag whose sides carry several conditions (sides held or
        given a flux without naming the tag) takes the one on most of its measure.
    sides : int
    measure : float
        Length (2-D) or area (3-D) of its sides; 0 for held points on no held side.
    u_min, u_max, u_mean : float
        Over its sides' points, the mean weighted by length or area (exact for P1);
        over the points themselves for held points on no side.
    outflow : float
        What leaves the body through it (positive out), computed conservatively.
    """

    tag: int | None
    label: str
    condition: str
    sides: int
    measure: float
    u_min: float
    u_max: float
    u_mean: float
    outflow: float


@dataclasses.dataclass(frozen=True)
class Balance:
    """Regions, boundary parts and the balance of a solution (see :func:`balance`).

    Attributes
    ----------
    regions : tuple of RegionResult
        By region tag.
    boundary : tuple of BoundaryResult
        Every boundary tag of the mesh, then the untagged entries.
    sources, absorbed, outflow : float
        Sums of the regions' sources, of what they absorb and of the boundary outflows.
    imbalance : float
        ``sources - absorbed - outflow``: minus the residual summed over the free points.
    relative : float
        ``|imbalance| / max(|sources|, |absorbed| + sum |outflow|)``.
    """

    regions: tuple
    boundary: tuple
    sources: float
    absorbed: float
    outflow: float
    imbalance: float
    relative: float

    def as_dict(self):
        """The results as plain JSON types: lists of dicts for regions and boundary parts,
        floats for the totals, and the caution."""
        return {"regions": [dataclasses.asdict(r) for r in self.regions],
                "boundary": [dataclasses.asdict(b) for b in self.boundary],
                "sources": self.sources, "absorbed": self.absorbed, "outflow": self.outflow,
                "imbalance": self.imbalance, "relative": self.relative, "caution": CAUTION}


def balance(solution, u=None):
    """Results by region and by boundary part, and the balance of a solution.

    Parameters
    ----------
    solution : PoissonSolution or PoissonProblem
        A solution of :func:`hatkernels.solve_poisson` (its ``.problem``), or a
        problem, then with ``u``.
    u : ndarray (n_points,), optional
        The values at the points of the problem's mesh; default ``solution.u``.

    Returns
    -------
    Balance

    Raises
    ------
    InputError
        No problem (a solution made without one), no ``u`` (a problem alone, or a
        distributed solution on a rank where ``u`` was not gathered), or a ``u``
        of the wrong shape or not finite (naming the point).

    Notes
    -----
    See the module's notes for the sign, the units and how the outflows are
    computed.  The cost is a few assemblies: the stiffness matrix (and the
    reaction and Robin matrices when the problem has them) and the loads, with
    no loop over cells or sides.  The matrix is assembled even when the solve
    was matrix-free: expect about the memory of an assembled solve's matrix
    (csr: about 7 entries per point on triangles and 15 on tetrahedra, 12
    bytes each) for the time of the call.

    Examples
    --------
    >>> import hatkernels
    >>> from hatkernels.results import balance
    >>> sol = hatkernels.solve_poisson(hatkernels.mesh.rectangle(8, 8), 1.0, rtol=1e-12)
    >>> b = balance(sol)
    >>> b.regions[0].label, round(b.regions[0].source, 12)
    ('all cells', 1.0)
    >>> b.boundary[0].label, b.boundary[0].condition, round(b.boundary[0].outflow, 9)
    ('held points (untagged)', 'held', 1.0)
    >>> b.relative < 1e-9
    True
    """
    problem, u = _problem_and_u(solution, u)
    mesh, q = problem.mesh, problem.quadrature
    regions = _regions(problem, u)
    res = _residual(problem, u)
    parts = _Parts(mesh, q, u)
    _held(problem, res, parts)
    _side_pieces(problem, u, parts)
    boundary = parts.results()
    sources = float(sum(r.source for r in regions))
    absorbed = float(sum(r.absorbed for r in regions))
    outflow = float(sum(b.outflow for b in boundary))
    imbalance = sources - absorbed - outflow
    scale = max(abs(sources), abs(absorbed) + sum(abs(b.outflow) for b in boundary),
                np.finfo(float).tiny)
    return Balance(tuple(regions), tuple(boundary), sources, absorbed, outflow, imbalance,
                   float(abs(imbalance) / scale))


def _problem_and_u(solution, u):
    if isinstance(solution, PoissonProblem):
        problem = solution
        if u is None:
            raise InputError("balance(problem, u): a PoissonProblem needs the values u at its "
                             "points")
    else:
        problem = getattr(solution, "problem", None)
        if not isinstance(problem, PoissonProblem):
            raise InputError(f"balance needs a PoissonSolution with its problem (.problem) or "
                             f"a PoissonProblem and u, got {type(solution).__name__} with "
                             f"problem {type(problem).__name__}")
        if u is None:
            u = solution.u
        if u is None:
            raise InputError(f"balance: this {type(solution).__name__} has no u (rank "
                             f"{getattr(solution, 'rank', 0)} was not given the gathered "
                             f"solution); solve with gather=True, or pass u")
    u = np.array(_nodal(problem.mesh, u), dtype=np.float64)
    u[problem.mesh.unused_points()] = 0.0  # never read by a cell; kept out of the figures
    return problem, u


def _cell_loads(mesh, coef, q):
    """``int_T coef phi_a`` for each cell and vertex, (n_cells, dim + 1): the element loads,
    whose sum over a row is ``int_T coef`` (the hat functions sum to one)."""
    if mesh.dim == 2:
        return load_values(mesh, coef, q)
    return tetrahedron_load_values(mesh.points, mesh.cells, mesh.volumes(), coef, q)


def _regions(problem, u):
    """One :class:`RegionResult` per region tag (one for all cells without tags)."""
    mesh, q = problem.mesh, problem.quadrature
    tags = mesh.tags
    keys = [] if tags is None else tags.region_tags().tolist()
    if keys:
        index = np.searchsorted(np.asarray(keys), tags.regions)
    else:
        index = np.zeros(mesh.n_cells, dtype=np.int64)
        keys = [None]
    n = len(keys)
    uc = u[mesh.cells]
    measure = mesh.measures()

    def total(weights):
        return np.bincount(index, weights=weights, minlength=n)

    integral = total(measure * uc.mean(axis=1))
    source = total(_cell_loads(mesh, problem.source, q).sum(axis=1))
    absorbed = np.zeros(n) if problem.reaction is None else total(
        (_cell_loads(mesh, problem.reaction, q) * uc).sum(axis=1))
    order = np.argsort(index, kind="stable")
    starts = np.searchsorted(index[order], np.arange(n))
    low = np.minimum.reduceat(uc.min(axis=1)[order], starts)
    high = np.maximum.reduceat(uc.max(axis=1)[order], starts)
    cells = np.bincount(index, minlength=n)
    area = total(measure)
    return [RegionResult(None if t is None else int(t),
                         "all cells" if t is None else tags.region_label(t),
                         int(cells[k]), float(area[k]), float(low[k]), float(high[k]),
                         float(integral[k] / area[k]), float(source[k]), float(absorbed[k]))
            for k, t in enumerate(keys)]


def _residual(problem, u):
    """``A u - b`` of the full system (no Dirichlet reduction), as :func:`discretise` builds it."""
    mesh, q = problem.mesh, problem.quadrature
    assembler = StiffnessAssembler(mesh)
    res = assembler.assemble(problem.coefficient, quadrature=q) @ u
    if problem.reaction is not None:
        res += assembler.assemble_mass(problem.reaction, quadrature=q) @ u
    if problem.robin is not None:
        rb = problem.robin
        res += side_mass(mesh, rb.r, rb.sides, q) @ u
        res -= side_load(mesh, rb.s, rb.sides, q)
    if problem.flux is not None:
        res -= side_load(mesh, problem.flux.flux, problem.flux.sides, q)
    res -= assemble_load(mesh, problem.source, quadrature=q)
    return res


class _Parts:
    """The boundary entries as they are filled: sides, measure per condition and outflow."""

    def __init__(self, mesh, q, u):
        self.mesh, self.q, self.u = mesh, q, u
        self.outflow, self.sides, self.kinds, self.loose = {}, {}, {}, None
        tags = mesh.tags
        self.tags = [] if tags is None else tags.boundary_tags().tolist()
        for t in self.tags:
            self.outflow[t] = 0.0
            self.sides[t] = [tags.sides_of([t]).astype(np.int64)]
            self.kinds[t] = {}

    def measure(self, sides):
        return float(side_load(self.mesh, _ONE, sides, self.q).sum()) if len(sides) else 0.0

    def add(self, tag, kind, sides, outflow):
        """``outflow`` through ``sides`` (all of tag ``tag``, or untagged when None)."""
        key = kind if tag is None else tag
        self.outflow[key] = self.outflow.get(key, 0.0) + outflow
        if tag is None:
            self.sides.setdefault(key, []).append(sides)
        else:
            self.kinds[tag][kind] = self.kinds[tag].get(kind, 0.0) + self.measure(sides)

    def results(self):
        out = [self._result(t, self.mesh.tags.side_label(t), self._condition(t))
               for t in self.tags]
        out += [self._result(k, label, k, untagged=True) for k, label in _UNTAGGED.items()
                if k in self.outflow]
        return out

    def _condition(self, t):
        kinds = dict(self.kinds[t])
        rest = self.measure(self.sides[t][0]) - sum(kinds.values())
        if not kinds or rest > max(kinds.values()):
            return "insulated"
        return max(kinds, key=kinds.get)

    def _result(self, key, label, condition, untagged=False):
        sides = np.concatenate(self.sides.get(key, [np.empty((0, self.mesh.dim), np.int64)]))
        if len(sides) > 1:
            sides = np.unique(np.sort(sides, axis=1), axis=0)  # pieces may share sides
        u = self.u
        if len(sides):
            w = side_load(self.mesh, _ONE, sides, self.q)
            measure = float(w.sum())
            at = u[np.unique(sides)]
            mean = float(w @ u / measure)
        else:  # held points on no held side
            measure, at = 0.0, u[self.loose]
            mean = float(at.mean())
        return BoundaryResult(None if untagged else int(key), label, condition, len(sides),
                              measure, float(at.min()), float(at.max()), mean,
                              float(self.outflow[key]))


def _side_tags(mesh, sides):
    """The boundary tag of each row of ``sides`` and whether it has one."""
    tags = mesh.tags
    if tags is None or not len(tags.sides) or not len(sides):
        return np.zeros(len(sides), np.int64), np.zeros(len(sides), dtype=bool)
    pos = _row_positions(np.sort(tags.sides.astype(np.int64), axis=1),
                         np.sort(np.asarray(sides, dtype=np.int64), axis=1))
    found = pos >= 0
    return np.where(found, tags.side_tags[np.maximum(pos, 0)], 0), found


def _by_tag(mesh, sides):
    """``(tag or None, rows)`` of ``sides`` grouped by their boundary tag."""
    tag, found = _side_tags(mesh, sides)
    groups = [(int(t), np.flatnonzero(found & (tag == t))) for t in np.unique(tag[found])]
    if not found.all():
        groups.append((None, np.flatnonzero(~found)))
    return groups


def _held(problem, res, parts):
    """The held parts' outflow: ``-res`` at the held points, split between the held sides
    touching each point in proportion to ``int phi_i`` over them."""
    held = problem.dirichlet.points
    if problem.floating.size:  # the points the solve pins in a zero_mean part are not the user's
        held = np.setdiff1d(held, _pins(problem.mesh, problem.floating))
    if not held.size:
        return
    mesh, q = problem.mesh, problem.quadrature
    groups = [(p.tag, p.sides) for p in problem.pieces if p.kind == "held"]
    # sides held without naming their tag (whole boundary, points, sides): all points held
    # and no piece of their own
    b = (mesh.boundary_faces() if mesh.dim == 3 else mesh.boundary_edges()).astype(np.int64)
    is_held = np.zeros(mesh.n_points, dtype=bool)
    is_held[held] = True
    b = b[is_held[b].all(axis=1)]
    if problem.pieces and len(b):
        claimed = np.concatenate([p.sides for p in problem.pieces])
        b = b[_row_positions(np.sort(claimed, axis=1), np.sort(b, axis=1)) < 0]
    groups += [(t, b[rows]) for t, rows in _by_tag(mesh, b)]
    weights = [side_load(mesh, _ONE, s, q)[held] for _, s in groups]
    near = np.sum(weights, axis=0) if weights else np.zeros(held.size)
    r = res[held]
    on_sides = near > 0
    for (tag, sides), w in zip(groups, weights, strict=True):
        share = np.divide(w, near, out=np.zeros_like(w), where=on_sides)
        parts.add(tag, "held", sides, -float(r @ share))
    if not on_sides.all():
        parts.loose = held[~on_sides]
        parts.add(None, "held", np.empty((0, mesh.dim), np.int64), -float(r[~on_sides].sum()))


def _restricted(coef, rows):
    """A side coefficient on the sides ``rows`` of those it was given on (same values)."""
    if coef.kind == "edge":
        return dataclasses.replace(coef, value=np.asarray(coef.value)[rows])
    v = coef.value
    if isinstance(v, Pieces):  # data given tag by tag: keep each side's own piece
        return dataclasses.replace(coef, value=Pieces(v.parts, v.index[rows], v.rank[rows],
                                                      v.points, v.items[rows]))
    return coef  # constants, per-point values and callables hold on any sides


def _side_pieces(problem, u, parts):
    """The flux and convection parts' outflow, from the merged data the solve used, piece by
    piece and, for a piece given without a tag, tag by tag of its sides."""
    mesh, q = problem.mesh, problem.quadrature
    for kind, merged in (("flux", problem.flux), ("convection", problem.robin)):
        if merged is None:
            continue
        pieces = [p for p in problem.pieces if p.kind == kind]
        data = (merged.flux,) if kind == "flux" else (merged.r, merged.s)
        # the merged data (what the solve used) on each piece's rows: parse_conditions
        # merges the pieces' sides in order
        ends = np.cumsum([len(p.sides) for p in pieces])
        for p, stop in zip(pieces, ends, strict=True):
            rows = np.arange(stop - len(p.sides), stop)
            groups = [(p.tag, rows)] if p.tag is not None else [
                (t, rows[k]) for t, k in _by_tag(mesh, merged.sides[rows])]
            for tag, sel in groups:
                e = merged.sides[sel]
                c = [_restricted(x, sel) for x in data]
                out = -side_load(mesh, c[-1], e, q).sum()  # the flux h, or the Robin s
                if kind == "convection":
                    out += (side_mass(mesh, c[0], e, q) @ u).sum()
                parts.add(tag, kind, e, float(out))
