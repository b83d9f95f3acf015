"""Reweighting after the run, through a real OpenMM run with the reporter, on a 3-D analytic potential.

One particle moves on U(x, y, z) (OpenMM custom force); x is biased (well-tempered), y is logged as an
observable by the reporter, and z is computed afterwards from the DCD written by OpenMM's DCDReporter,
read with mdtraj. Both reweighted profiles must match the exact marginals F(y), F(z) (scipy quadrature)
and the reweighted averages the exact expectation values of the same model.
"""

import math

import numpy as np
import pytest

openmm = pytest.importorskip("openmm")
mdtraj = pytest.importorskip("mdtraj")
from openmm import app  # noqa: E402
from scipy import integrate  # noqa: E402

from gridbias import analysis, trajectories  # noqa: E402
from gridbias import openmm as gbo  # noqa: E402
from gridbias.cvlog import read_cvlog  # noqa: E402
from gridbias.errors import ParameterError  # noqa: E402

pytestmark = pytest.mark.openmm

TEMPERATURE = 300.0
KT = TEMPERATURE * 0.00831446261815324  # kJ/mol (R in kJ/mol/K, CODATA 2018)
# U(x, y, z), kJ/mol and nm: a tilted double well in x (barrier 5 kT), y harmonic about 0.5 x, and a double well
# in z (barrier 1.5 kT) about 0.6 y. Coupled, so the marginals are not those of the separate terms.
A, TILT, KY, SLOPE_Y, BZ, SLOPE_Z, HALF_GAP = 5 * KT, 0.5 * KT, 30.0, 0.5, 1.5 * KT, 0.6, 0.5
EXPRESSION = (f"{A}*(x^2-1)^2 + {TILT}*x + {KY / 2}*(y-{SLOPE_Y}*x)^2"
              f" + {BZ}*((z-{SLOPE_Z}*y)^2-{HALF_GAP ** 2})^2/{HALF_GAP ** 4}")
LOG_EVERY, DCD_EVERY = 100, 200
N_STEPS = 300_000
BOUND = 3.5  # nm: the integrals run over [-BOUND, BOUND], where exp(-U/kT) is below 1e-40 at the edges


def _ux(x):
    return A * (x**2 - 1) ** 2 + TILT * x


def _uy(x, y):
    return KY / 2 * (y - SLOPE_Y * x) ** 2


def _uz(y, z):
    return BZ * ((z - SLOPE_Z * y) ** 2 - HALF_GAP**2) ** 2 / HALF_GAP**4


def _quad(f, lo=-BOUND, hi=BOUND):
    return integrate.quad(f, lo, hi, epsabs=0, epsrel=1e-10, limit=200)[0]


def _gx_y(y):
    """int dx exp(-(Ux + Uy)/kT) at y."""
    return _quad(lambda x: math.exp(-(_ux(x) + _uy(x, y)) / KT))


def _gz_y(y):
    """int dz exp(-Uz/kT) at y (does not depend on y: Uz depends on z - 0.6 y only, up to the bound)."""
    return _quad(lambda z: math.exp(-_uz(y, z) / KT), SLOPE_Z * y - BOUND, SLOPE_Z * y + BOUND)


def exact_marginal_y(y_points):
    """F(y) = -kT ln int int exp(-U/kT) dx dz, by scipy quadrature (minimum 0)."""
    p = np.array([_gx_y(y) * _gz_y(y) for y in y_points])
    f = -KT * np.log(p)
    return f - f.min()


def exact_marginal_z(z_points):
    """F(z) = -kT ln int int exp(-U/kT) dx dy, by scipy quadrature (minimum 0)."""
    p = np.array([_quad(lambda y, z=z: _gx_y(y) * math.exp(-_uz(y, z) / KT)) for z in z_points])
    f = -KT * np.log(p)
    return f - f.min()


def exact_average(g):
    """<g(x, y)> over the model, z integrated out, by scipy quadrature (nested quad)."""
    def density(y, x):
        return math.exp(-(_ux(x) + _uy(x, y)) / KT)

    z_norm = integrate.dblquad(density, -BOUND, BOUND, -BOUND, BOUND, epsrel=1e-9)[0]
    num = integrate.dblquad(lambda y, x: g(x, y) * density(y, x), -BOUND, BOUND, -BOUND, BOUND, epsrel=1e-9)[0]
    return num / z_norm


def _topology():
    top = app.Topology()
    residue = top.addResidue("P", top.addChain())
    top.addAtom("P", app.element.carbon, residue)
    return top


def run_biased(folder, seed, *, n_steps=N_STEPS, observables=True):
    """The biased run: x biased, y logged as an observable, DCD every DCD_EVERY steps. Returns the link."""
    system = openmm.System()
    system.addParticle(10.0)
    force = openmm.CustomExternalForce(EXPRESSION)
    force.addParticle(0, [])
    system.addForce(force)
    cvs = [gbo.coordinate(0, "x", name="x")]
    bias = gbo.make_bias(cvs, lower=[-2.2], upper=[2.2], bins=[110], sigma=[0.1], height=1.0,
                         temperature=TEMPERATURE, bias_factor=5.0)
    link = gbo.attach(system, cvs, bias, route="cvforce")  # Reference + CustomCVForce: the cheap route here
    integrator = openmm.LangevinMiddleIntegrator(TEMPERATURE, 5.0, 0.01)
    integrator.setRandomNumberSeed(seed)
    simulation = app.Simulation(_topology(), system, integrator, openmm.Platform.getPlatformByName("Reference"))
    simulation.context.setPositions([[-1.0, -0.5, 0.0]])
    simulation.context.setVelocitiesToTemperature(TEMPERATURE, seed)
    extra = {"observables": [gbo.coordinate(0, "y", name="y")]} if observables else {}
    reporter = link.reporter(LOG_EVERY, log=str(folder / "run.gbl"), **extra)
    simulation.reporters.append(reporter)
    simulation.reporters.append(app.DCDReporter(str(folder / "run.dcd"), DCD_EVERY))
    simulation.step(n_steps)
    reporter.close()
    return link
