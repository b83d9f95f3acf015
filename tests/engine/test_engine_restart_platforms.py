"""Restarts of every route on Reference, CPU and OpenCL: what continues bit for bit and what does not.

Reference: OpenMM's ``Context.createCheckpoint`` / ``loadCheckpoint``, which restore a Context exactly on
the platform that wrote it. The yardstick is N steps + save + N steps in one run against restore + N
steps in a fresh Simulation and link: positions, velocities and the bias must be equal bit for bit where
the platform is deterministic (Reference; CPU with one thread; OpenCL, which accumulates forces in fixed
point: measured here on pocl). A checkpoint restored on another platform continues from the portable
state (positions, velocities, box, step, time): the bias and its engine tables are restored exactly, the
coordinates are rounded to the new platform's precision, and the trajectory is not the one the old
platform would have produced.
"""

import math
import warnings

import numpy as np
import pytest

mm = pytest.importorskip("openmm")

from openmm import app  # noqa: E402
from test_engine_parity import PLATFORMS, platform_or_skip  # noqa: E402

from gridbias import openmm as gbo  # noqa: E402

pytestmark = pytest.mark.openmm


def dipeptide_run(key, route, seed=5):
    from gridbias.demo.dipeptide import backbone_dihedral_atoms, build_dipeptide

    platform, props, _ = platform_or_skip(key)
    top, pos, system = build_dipeptide()
    phi, psi = backbone_dihedral_atoms(top)
    cvs = [gbo.dihedral(*phi), gbo.dihedral(*psi)]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        bias = gbo.make_bias(cvs, lower=[-math.pi] * 2, upper=[math.pi] * 2, bins=[64, 64],
                             sigma=[0.35, 0.35], height=1.2, temperature=300.0, bias_factor=10.0)
    link = gbo.attach(system, cvs, bias, route=route)
    integrator = mm.LangevinMiddleIntegrator(300, 1, 0.002)
    integrator.setRandomNumberSeed(seed)
    sim = app.Simulation(top, system, integrator, platform, props)
    sim.context.setPositions(pos)
    sim.context.setVelocitiesToTemperature(300, 3)
    sim.reporters.append(link.reporter(stride=20))
    return link, sim


def state_arrays(sim):
    state = sim.context.getState(getPositions=True, getVelocities=True)
    return state.getPositions(asNumpy=True)._value, state.getVelocities(asNumpy=True)._value


@pytest.mark.parametrize("key, route", [("Reference", "cvforce"), ("CPU", "cvforce"),
                                        ("OpenCL-single", "cvforce"), ("OpenCL-mixed", "cvforce"),
                                        ("OpenCL-single", "compound")])
def test_restart_on_the_same_platform_is_bit_for_bit(tmp_path, key, route):
    path = tmp_path / "run.gbz"
    link, sim = dipeptide_run(key, route)
    sim.step(200)
    link.save(sim, path)
    sim.step(200)
    other, sim2 = dipeptide_run(key, route, seed=99)  # another seed: the checkpoint must restore it
    other.restore(sim2, path)
    sim2.step(200)
    for a, b in zip(state_arrays(sim), state_arrays(sim2), strict=True):
        assert np.array_equal(a, b)
    assert np.array_equal(link.bias.values, other.bias.values)
    assert other.bias.n_hills == link.bias.n_hills == 20


@pytest.mark.parametrize("key", ["OpenCL-single", "OpenCL-mixed"])
def test_reference_checkpoint_continues_on_opencl_from_the_portable_state(tmp_path, key, caplog):
    """The bias comes back exactly (engine equals core to the precision's rounding); positions and
    velocities come back rounded to the OpenCL precision (float32 in single precision)."""
    path = tmp_path / "run.gbz"
    link, sim = dipeptide_run("Reference", "cvforce")
    sim.step(200)
    link.save(sim, path)
    positions, velocities = state_arrays(sim)
    other, sim2 = dipeptide_run(key, "cvforce")
    with caplog.at_level("WARNING", logger="gridbias.openmm"):
        other.restore(sim2, path)
    assert "portable state" in caplog.text
    assert np.array_equal(other.bias.values, link.bias.values)
    p2, v2 = state_arrays(sim2)
    assert np.allclose(p2, positions, rtol=1e-6, atol=1e-7)
    assert np.allclose(v2, velocities, rtol=1e-6, atol=1e-6)
    s = other.cv_values(sim2)
    core = other.bias.evaluate(s)[0]
    tol = PLATFORMS[key][2][0]
    assert abs(other.bias_energy(sim2) - core) <= tol * (np.abs(other.bias.values).max() + abs(core))
    sim2.step(40)
    assert other.bias.n_hills == link.bias.n_hills + 2
