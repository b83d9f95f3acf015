"""The core's own spline as OpenMM tables (private): discrete tables + the cubic Hermite written out.

The core holds, per node, the value and the spline derivatives that define its tensor-product cubic
Hermite interpolant (``GridBias._coef``: ``2**d`` arrays, derivatives in index units). Here each array
becomes one ``Discrete1DFunction`` (flat node index) and the energy expression evaluates the interpolant
itself: the cell and the fraction ``t`` per axis from ``floor``, the four Hermite weights of ``t`` per
axis, and the ``2**d`` corners x ``2**d`` tables of the patch. OpenMM differentiates the expression for
the forces (a discrete table's derivative is zero, so the force is exactly dE/dt / spacing, the core's
gradient).

Why: the engine then applies the core's function itself, not a refit of its node values, and a table
update only copies numbers (no spline solve): 0.4 ms for 129^2 on the Reference platform against 4-6 ms
for a ``Continuous2DFunction`` (DESIGN.md, 2026-12-02), so every deposit can be pushed and the engine
equals the core at every step. Periodic axes wrap in the expression, so mixed periodicity needs no
padding. Tables are closed on periodic axes (node ``bins`` repeats node 0) so that the upper corner of
the last cell is always inside the table; indices are clamped (a discrete table is undefined outside).

Only in a CustomCVForce: inside a CustomCompoundBondForce every update recompiles this expression
(0.8-1.5 s, DESIGN.md).
"""

from __future__ import annotations

import itertools

import numpy as np

from ..errors import ParameterError

__all__ = ["HermiteTables", "index_coordinate", "MAX_TABLE_NODES"]

#: Largest table (nodes, periodic axes closed) of the cvforce route: flat node indices are computed in
#: the expression, exactly only up to 2**24 in single precision.
MAX_TABLE_NODES = 2**24


def index_coordinate(variable, grid, a) -> str:
    """Expression of the index coordinate of axis ``a`` (0 at the lower limit, 1 per grid spacing, not
    wrapped) as a function of the CV ``variable``."""
    return f"({variable}-({float(grid.lower[a])!r}))/({float(grid.spacing[a])!r})"


def _axis_terms(a, grid, prefix):
    """Definitions of the cell index ``{p}c{a}``, the fraction ``{p}t{a}`` and the 4 Hermite weights of
    axis ``a`` (``{p}v{a}_{k}`` weigh node values, ``{p}s{a}_{k}`` node slopes, corner k = 0 lower, 1
    upper) from its index coordinate ``{p}u{a}``, plus the mask that is 1 inside a non-periodic axis
    ('' on a periodic one)."""
    n = int(grid.bins[a])
    p = prefix
    u, t = f"{p}u{a}", f"{p}t{a}"
    if grid.periodic[a]:
        w = f"{p}w{a}"
        wrap = [f"{w}={u}-{n}*floor({u}/{n})"]
        mask = ""
    else:
        w, wrap = u, []
        mask = f"step({u})*step({n}-{u})"
    defs = [
        f"{p}v{a}_0=(2*{t}-3)*{t}*{t}+1",
        f"{p}v{a}_1=(3-2*{t})*{t}*{t}",
        f"{p}s{a}_0=(({t}-2)*{t}+1)*{t}",
        f"{p}s{a}_1=({t}-1)*{t}*{t}",
        f"{t}={w}-{p}c{a}",
        f"{p}c{a}=min(max(floor({w}),0),{n - 1})",
    ] + wrap
    return defs, mask


class HermiteTables:
    """Discrete tables holding a GridBias's spline coefficients, and the expression that applies them.

    Parameters
    ----------
    grid : Grid
    prefix : str
        Prefix of the table and variable names.

    Attributes
    ----------
    energy : str
        The grid part of the bias as an expression of the index coordinates ``{prefix}u0 ..``
        (``index_coordinate``; its variable definitions follow after ``;`` separators, as OpenMM's custom
        forces read them). The caller defines the index coordinates.
    names : list of str
        Table names, one per coefficient array ``m`` (0: values; bit a of m set: derivative along a).
    shape : tuple of int
        Table sizes (x, y, z): ``bins + 1`` on every axis.
    """

    def __init__(self, grid, prefix):
        d = grid.ndim
        self.ndim = d
        self.names = [f"{prefix}coef{m}" for m in range(1 << d)]
        defs, masks = [], []
        for a in range(d):
            axis_defs, mask = _axis_terms(a, grid, prefix)
            defs += axis_defs
            if mask:
                masks.append(mask)
        # Table order: x fastest (NumPy order "F"), periodic axes closed by repeating node 0.
        node_index = [np.arange(int(grid.bins[a]) + 1) % int(grid.shape[a]) for a in range(d)]
        self.shape = tuple(len(ix) for ix in node_index)
        # One flat index per cell: a lookup with one argument instead of d costs OpenMM less to compile
        # (a 3-D Context: ~2 s instead of ~3.5 s, on this 2-core machine); flat indices must stay below
        # 2**24 to be exact in single precision (OpenCL, CUDA).
        if int(np.prod(self.shape)) > MAX_TABLE_NODES:
            raise ParameterError(f"the cvforce route's tables hold at most {MAX_TABLE_NODES} nodes (exact "
                                 f"indices in single precision); this grid needs {int(np.prod(self.shape))}: "
                                 "use fewer bins or route='compound'")
        strides = [int(np.prod(self.shape[:a])) for a in range(d)]
        defs.insert(0, f"{prefix}cell=" + "+".join(f"{strides[a]}*{prefix}c{a}" if a else f"{prefix}c{a}"
                                                   for a in range(d)))
        patch = self._patch(prefix, d)
        body = f"({'*'.join(masks)})*({patch})" if masks else f"({patch})"
        self.energy = "; ".join([body] + defs)
        core_strides = np.cumprod((1,) + tuple(int(x) for x in grid.shape[::-1]))[:-1][::-1]  # C order
        mesh = np.meshgrid(*node_index, indexing="ij")
        flat = sum(np.asarray(ix, dtype=np.int64) * int(s) for ix, s in zip(mesh, core_strides, strict=True))
        self._index = np.ascontiguousarray(flat.ravel(order="F"))

    def _patch(self, prefix, d):
        """The Hermite patch, summed one axis at a time. OpenMM inlines every intermediate variable
        before it differentiates and compiles an expression, so the size of the written-out sum matters:
        a 3-D Context takes ~2 s with this factored form, ~24 s with the flat 64-term sum.

        Level a sums over corner k_a and derivative bit b_a of axis a, for every corner and bit of the
        axes above a: ``L_{a+1}[rest] = sum_{k, b} L_a[k, b, rest] * W_a[b][k]``, with ``L_0`` the table
        lookups and ``W_a[0][k] = v{a}_k`` (value weights), ``W_a[1][k] = s{a}_k`` (slope weights).
        """
        def weight(a, b, k):
            return f"{prefix}{'s' if b else 'v'}{a}_{k}"

        # terms[(corners of axes >= a, bits of axes >= a)] -> expression
        terms = {}
        sizes = [int(n) for n in self.shape]
        for corner in itertools.product((0, 1), repeat=d):
            offset = sum(corner[a] * int(np.prod(sizes[:a])) for a in range(d))
            index = f"{prefix}cell+{offset}" if offset else f"{prefix}cell"
            for bits in itertools.product((0, 1), repeat=d):
                m = sum(b << a for a, b in enumerate(bits))
                terms[corner, bits] = f"{self.names[m]}({index})"
        for a in range(d):
            reduced = {}
            for (corner, bits), expr in terms.items():
                key = (corner[1:], bits[1:])
                reduced.setdefault(key, []).append(f"{expr}*{weight(a, bits[0], corner[0])}")
            terms = {key: "(" + "+".join(parts) + ")" for key, parts in reduced.items()}
        return terms[(), ()]

    def table_values(self, coef, m) -> np.ndarray:
        """(prod(shape),) float: coefficient array ``m`` of ``coef`` (the core's ``(2**d, n0, n1, n2)``
        array) in the order of table ``m``."""
        return coef[m].reshape(-1)[self._index]

    def make_functions(self, openmm, coef) -> list:
        """One ``Discrete1DFunction`` (flat index, x fastest) per coefficient array, filled from ``coef``."""
        return [openmm.Discrete1DFunction(self.table_values(coef, m)) for m in range(len(self.names))]

    def set_values(self, force, first_index, coef) -> None:
        """Copy ``coef`` into the force's tables (``first_index``: index of table 0 in the force); the
        caller then calls ``force.updateParametersInContext``."""
        for m in range(len(self.names)):
            force.getTabulatedFunction(first_index + m).setFunctionParameters(self.table_values(coef, m))
