"""Which engine route applies a bias on which OpenMM platform, and how many pending hills (private).

Two routes (measured in bench/bench_routes.py; figures in bench/README.md, "Engine routes"):

- ``"cvforce"``: one CustomCVForce whose tables hold the core's spline coefficients (discrete tables, the
  cubic Hermite written out; gridbias.openmm.hermite). A push only copies numbers (~0.25 ms for 129^2,
  ~17 ms for 65^3), so every deposit is pushed and the engine equals the core at every step. The force
  carries an inner Context: as cheap per step as any static table on the Reference platform, but ~50 us
  per step for a 22-atom molecule and ~0.55 ms for 8,900 atoms in water on the CPU platform.
- ``"compound"``: the CVs inside one CustomCompoundBondForce (or CustomCentroidBondForce) with a
  continuous table (OpenMM refits its spline and recompiles the force at every push: ~15 ms for 129^2,
  0.3-0.6 s for 65^3) plus a second force holding the newest hills as exact Gaussians (global parameters,
  no recompile), folded into the table every ``pending + 1`` deposits. Cheapest per step on the CPU
  platform; no per-step round trip through an inner Context.

The rule (``choose``): Reference -> cvforce; every other platform -> compound, with the pending-hill
count that minimises the modelled cost per deposit (below). ``from_force`` CVs always need cvforce.
"""

from __future__ import annotations

import math

__all__ = ["ROUTES", "TYPICAL_STRIDE", "choose", "default_platform", "pending_for", "compound_push_seconds"]

ROUTES = ("compound", "cvforce")

#: The deposit stride the pending-hill count is tuned for (steps). The reporter's stride is only known
#: after the Context exists, when the forces can no longer change; 250-1000 is common practice.
TYPICAL_STRIDE = 500

# Compound-route push = fixed + per node x table nodes (bench/README.md, "Scale": least-squares lines on
# the Reference and CPU platforms, 1 core; the fixed part is OpenMM recompiling the force's expression).
_PUSH_FIXED_S = {1: 3e-3, 2: 6e-3, 3: 16e-3}
_PUSH_PER_NODE_S = {1: 0.1e-6, 2: 0.35e-6, 3: 1.0e-6}
#: Per-step cost of one pending-hill slot in a CustomCompoundBondForce (bench/README.md: 0.6-1.2 us on
#: the Reference and CPU platforms; every slot is evaluated whether it holds a hill or not).
_SLOT_SECONDS = 1.0e-6
_MAX_PENDING = 64


def compound_push_seconds(ndim: int, nodes: int) -> float:
    """Modelled cost (s) of one compound-route table push for a table of ``nodes`` nodes."""
    return _PUSH_FIXED_S[ndim] + _PUSH_PER_NODE_S[ndim] * nodes


def pending_for(ndim: int, nodes: int, stride: int = TYPICAL_STRIDE) -> int:
    """Pending hills K minimising push / (K + 1) + K * slot cost * stride (the cost per deposit).

    The optimum of the continuous model is K + 1 = sqrt(push / (slot cost * stride)); the integer next to
    it with the lower modelled cost is returned, between 1 and 64.
    """
    push = compound_push_seconds(ndim, nodes)
    cost = lambda k: push / (k + 1) + k * _SLOT_SECONDS * stride  # noqa: E731
    k = math.sqrt(push / (_SLOT_SECONDS * stride)) - 1.0
    best = min((max(1, math.floor(k)), max(1, math.ceil(k))), key=cost)
    return int(min(best, _MAX_PENDING))


def default_platform(openmm) -> str:
    """The platform a Context made without naming one uses: the available one with the highest speed."""
    platforms = [openmm.Platform.getPlatform(i) for i in range(openmm.Platform.getNumPlatforms())]
    return max(platforms, key=lambda p: p.getSpeed()).getName()


def choose(platform: str, geometric: bool) -> str:
    """The route for a platform name: cvforce on Reference (or for non-geometric CVs), else compound."""
    if not geometric or platform == "Reference":
        return "cvforce"
    return "compound"
