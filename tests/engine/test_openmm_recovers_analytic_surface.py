"""Physical check: well-tempered metadynamics through OpenMM recovers an analytic free-energy surface.

One particle in U(x, y) = A (x^2 - 1)^2 + B (y - x^2 / 2)^2 + C z^2 (a CustomExternalForce), CVs its x and
y coordinates, LangevinMiddleIntegrator at 300 K. The z term separates, so the exact free energy of
(x, y) is U(x, y) itself. Well-tempered metadynamics converges to V = -(1 - 1/gamma) F + const
(Barducci, Bussi & Parrinello, PRL 100, 020603, 2008), so -(gamma / (gamma - 1)) V must reproduce U:
RMSE <= 0.5 kBT over the nodes within 8 kBT of the minimum (after the best constant shift).
"""

import numpy as np
import pytest

mm = pytest.importorskip("openmm")

from openmm import app  # noqa: E402

import gridbias as gb  # noqa: E402
from gridbias import openmm as gbo  # noqa: E402

pytestmark = [pytest.mark.openmm, pytest.mark.filterwarnings("ignore:axis .* coarser than sigma/2")]

A, B, C = 10.0, 20.0, 50.0  # kJ/mol, kJ/mol/nm^2, kJ/mol/nm^2
TEMPERATURE = 300.0
KT = gb.KB * TEMPERATURE


def potential(x, y):
    return A * (x**2 - 1) ** 2 + B * (y - 0.5 * x**2) ** 2


def run_wt(steps, seed, pending_hills):
    system = mm.System()
    system.addParticle(10.0)
    force = mm.CustomExternalForce(f"{A}*(x^2-1)^2 + {B}*(y-0.5*x^2)^2 + {C}*z^2")
    force.addParticle(0, [])
    system.addForce(force)
    cvs = [gbo.coordinate(0, "x"), gbo.coordinate(0, "y")]
    bias = gbo.make_bias(cvs, lower=[-2.0, -1.5], upper=[2.0, 2.5], bins=[60, 60], sigma=[0.1, 0.1], height=1.0,
                         temperature=TEMPERATURE, bias_factor=8.0,
                         walls=[gb.Wall(0, -1.7, 200.0, "below"), gb.Wall(0, 1.7, 200.0, "above"),
                                gb.Wall(1, -1.2, 200.0, "below"), gb.Wall(1, 2.2, 200.0, "above")])
    link = gbo.attach(system, cvs, bias, pending_hills=pending_hills)
    integrator = mm.LangevinMiddleIntegrator(TEMPERATURE, 5.0, 0.02)
    integrator.setRandomNumberSeed(seed)
    topology = app.Topology()
    topology.addAtom("P", app.element.carbon, topology.addResidue("PRT", topology.addChain()))
    sim = app.Simulation(topology, system, integrator, mm.Platform.getPlatformByName("Reference"))
    sim.context.setPositions([[-1.0, 0.5, 0.0]])
    sim.reporters.append(link.reporter(stride=100))
    sim.step(steps)
    return link


def test_well_tempered_recovers_analytic_surface():
    """600,000 steps of 20 fs (12 ns, 6,000 hills, ~7 s on one core): RMSE 0.29-0.35 kBT for seeds 3-4."""
    link = run_wt(600_000, seed=3, pending_hills=4)
    bias = link.bias
    xg, yg = np.meshgrid(*bias.grid.axes, indexing="ij")
    exact = potential(xg, yg)
    exact -= exact.min()
    estimate = bias.free_energy()
    region = (exact <= 8 * KT) & (np.abs(xg) < 1.7) & (yg > -1.2) & (yg < 2.2)
    diff = estimate[region] - exact[region]
    rmse = np.sqrt(np.mean((diff - diff.mean()) ** 2))
    assert rmse <= 0.5 * KT, f"RMSE {rmse / KT:.2f} kBT over {region.sum()} nodes"
