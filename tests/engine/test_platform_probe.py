"""The demo's platform probe times each platform with the bias it would run attached and depositing."""

import math
import warnings

import pytest

mm = pytest.importorskip("openmm")

from gridbias import openmm as gbo  # noqa: E402
from gridbias.demo.dipeptide import backbone_dihedral_atoms, build_dipeptide, fastest_platform  # noqa: E402
from gridbias.errors import ParameterError  # noqa: E402

pytestmark = pytest.mark.openmm


def test_probe_times_each_platform_with_its_own_bias_route():
    top, pos, system = build_dipeptide()
    phi, psi = backbone_dihedral_atoms(top)
    cvs = [gbo.dihedral(*phi), gbo.dihedral(*psi)]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        bias = gbo.make_bias(cvs, lower=[-math.pi] * 2, upper=[math.pi] * 2, bins=[32, 32],
                             sigma=[0.35, 0.35], height=1.2, temperature=300.0, bias_factor=10.0)
    links = {}

    def probe(system_copy, name):
        assert system_copy is not system
        links[name] = gbo.attach(system_copy, cvs, bias.copy(), platform=name)
        return links[name]

    n_forces = system.getNumForces()
    name, rates = fastest_platform(system, pos, ("Reference", "CPU"), seconds=0.05, attach=probe, stride=50)
    assert set(rates) == set(links) == {"Reference", "CPU"} and rates[name] == max(rates.values())
    assert links["Reference"].route == "cvforce" and links["CPU"].route == "compound"
    assert all(link.bias.n_hills >= 2 for link in links.values())  # the probe deposited
    assert bias.n_hills == 0 and system.getNumForces() == n_forces  # the run's own bias and system untouched
    with pytest.raises(ParameterError, match="attach must be a callable"):
        fastest_platform(system, pos, seconds=0.05, attach="yes")
    with pytest.raises(ParameterError, match="stride must be an integer number of steps >= 1, got 0"):
        fastest_platform(system, pos, seconds=0.05, attach=probe, stride=0)
