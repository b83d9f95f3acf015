"""Tests of the demo system: blocked alanine dipeptide (ACE-ALA-NME) in vacuum with amber14."""

import math
import os

import numpy as np
import pytest

openmm = pytest.importorskip("openmm")
from openmm import app, unit  # noqa: E402

from gridbias.demo.dipeptide import (  # noqa: E402
    TIMESTEP,
    backbone_dihedral_atoms,
    build_dipeptide,
    dihedral_angles,
    fastest_platform,
    make_simulation,
    minimize,
    write_pdb,
)
from gridbias.errors import ParameterError  # noqa: E402

pytestmark = pytest.mark.openmm

KJ = unit.kilojoule_per_mole
REFERENCE = openmm.Platform.getPlatformByName("Reference")


@pytest.fixture(scope="module")
def c7eq():
    """The default build (C7eq start) and its minimised positions."""
    topology, positions, system = build_dipeptide()
    minimised, energy = minimize(system, positions)
    return topology, positions, system, minimised, energy


def _atom_index(topology, residue, name):
    (index,) = [a.index for a in topology.atoms() if a.residue.name == residue and a.name == name]
    return index


def _wrapped(a):
    return (np.asarray(a) + np.pi) % (2 * np.pi) - np.pi


def _openmm_torsions(n_atoms, positions, quads):
    """Torsions as OpenMM computes them: a CustomTorsionForce with energy 'theta', one force group each."""
    system = openmm.System()
    for _ in range(n_atoms):
        system.addParticle(1.0)
    for group, quad in enumerate(quads):
        force = openmm.CustomTorsionForce("theta")
        force.addTorsion(*quad, [])
        force.setForceGroup(group)
        system.addForce(force)
    context = openmm.Context(system, openmm.VerletIntegrator(0.001), REFERENCE)
    context.setPositions(np.asarray(positions) * unit.nanometer)
    energies = [context.getState(getEnergy=True, groups={g}).getPotentialEnergy() for g in range(len(quads))]
    return np.array([e.value_in_unit(KJ) for e in energies])


def _numpy_torsion(p0, p1, p2, p3):
    """Torsion from the plane normals (Blondel & Karplus, J. Comput. Chem. 17, 1132 (1996), from memory),
    written independently of the package."""
    b1, b2, b3 = p1 - p0, p2 - p1, p3 - p2
    n1, n2 = np.cross(b1, b2), np.cross(b2, b3)
    return math.atan2(np.dot(np.cross(n1, n2), b2 / np.linalg.norm(b2)), np.dot(n1, n2))


def _bond_targets(system):
    """{(i, j): equilibrium length nm} from the HarmonicBondForce and the constraints (X-H bonds)."""
    targets = {}
    for i in range(system.getNumConstraints()):
        a, b, r0 = system.getConstraintParameters(i)
        targets[frozenset((a, b))] = r0.value_in_unit(unit.nanometer)
    for force in system.getForces():
        if isinstance(force, openmm.HarmonicBondForce):
            for i in range(force.getNumBonds()):
                a, b, r0, _ = force.getBondParameters(i)
                targets[frozenset((a, b))] = r0.value_in_unit(unit.nanometer)
    return targets


def test_topology_is_ace_ala_nme_with_hydrogens(c7eq):
    topology, positions, system, *_ = c7eq
    assert topology.getNumAtoms() == 22 and positions.shape == (22, 3) and system.getNumParticles() == 22
    assert [r.name for r in topology.residues()] == ["ACE", "ALA", "NME"]
    assert topology.getNumBonds() == 21  # an acyclic molecule: atoms - 1
    formula = {}
    for atom in topology.atoms():
        formula[atom.element.symbol] = formula.get(atom.element.symbol, 0) + 1
    assert formula == {"C": 6, "H": 12, "N": 2, "O": 2}  # C6H12N2O2, counted from the three residues
    assert system.getNumConstraints() == 12  # HBonds: every X-H bond
    nonbonded = [f for f in system.getForces() if isinstance(f, openmm.NonbondedForce)]
    assert nonbonded[0].getNonbondedMethod() == openmm.NonbondedForce.NoCutoff
    assert not system.usesPeriodicBoundaryConditions()


def test_pdb_file_round_trip_is_accepted_by_amber14(tmp_path, c7eq):
    topology, positions, *_ = c7eq
    path = tmp_path / "dipeptide.pdb"
    write_pdb(path, topology, positions)
    pdb = app.PDBFile(str(path))
    assert [(a.residue.name, a.name) for a in pdb.topology.atoms()] == [
        (a.residue.name, a.name) for a in topology.atoms()
    ]
    system = app.ForceField("amber14-all.xml").createSystem(pdb.topology, nonbondedMethod=app.NoCutoff)
    assert system.getNumParticles() == 22
    assert backbone_dihedral_atoms(pdb.topology) == backbone_dihedral_atoms(topology)
    read_back = pdb.getPositions(asNumpy=True).value_in_unit(unit.nanometer)
    np.testing.assert_allclose(read_back, positions, atol=1e-4)  # the PDB format keeps 0.001 Angstrom


def test_backbone_atoms_found_by_name(c7eq):
    topology = c7eq[0]
    phi_atoms, psi_atoms = backbone_dihedral_atoms(topology)
    # IUPAC-IUB Commission on Biochemical Nomenclature, Biochemistry 9, 3471 (1970):
    # phi = C'(i-1)-N-CA-C', psi = N-CA-C'-N(i+1).
    assert phi_atoms == tuple(_atom_index(topology, r, n) for r, n in
                              (("ACE", "C"), ("ALA", "N"), ("ALA", "CA"), ("ALA", "C")))
    assert psi_atoms == tuple(_atom_index(topology, r, n) for r, n in
                              (("ALA", "N"), ("ALA", "CA"), ("ALA", "C"), ("NME", "N")))


def test_backbone_atoms_error_names_the_problem():
    topology = app.Topology()
    residue = topology.addResidue("ALA", topology.addChain())
    for name in ("N", "CA", "C"):
        topology.addAtom(name, app.element.carbon, residue)
    with pytest.raises(ParameterError, match="exactly one residue"):
        backbone_dihedral_atoms(topology)


@pytest.mark.parametrize(
    "phi_deg, psi_deg",
    [(-80.0, 70.0), (-150.0, 160.0), (60.0, -70.0), (0.0, 0.0), (179.9, -179.9), (-180.0, 180.0),
     (-65.0, -40.0)],
)
def test_built_dihedrals_match_the_request(phi_deg, psi_deg):
    # Convention: IUPAC-IUB 1970 (Biochemistry 9, 3471): phi = C'-N-CA-C', psi = N-CA-C'-N, signed so that
    # a clockwise turn of the front bond, seen along the central bond, is positive.
    phi, psi = math.radians(phi_deg), math.radians(psi_deg)
    topology, positions, system = build_dipeptide(phi, psi)
    quads = backbone_dihedral_atoms(topology)
    expected = np.array([phi, psi])
    from_openmm = _openmm_torsions(22, positions, quads)
    from_numpy = np.array([_numpy_torsion(*positions[list(q)]) for q in quads])
    np.testing.assert_allclose(_wrapped(from_openmm - expected), 0.0, atol=1e-6)
    np.testing.assert_allclose(_wrapped(from_numpy - expected), 0.0, atol=1e-6)
    np.testing.assert_allclose(_wrapped(dihedral_angles(positions, quads) - expected), 0.0, atol=1e-9)
    # both peptide bonds trans (omega = pi)
    omegas = [(("ACE", "CH3"), ("ACE", "C"), ("ALA", "N"), ("ALA", "CA")),
              (("ALA", "CA"), ("ALA", "C"), ("NME", "N"), ("NME", "C"))]
    omega_quads = [tuple(_atom_index(topology, r, n) for r, n in quad) for quad in omegas]
    np.testing.assert_allclose(np.abs(_openmm_torsions(22, positions, omega_quads)), np.pi, atol=1e-6)


def test_dihedral_sign_follows_iupac_by_hand():
    # IUPAC-IUB 1970: seen along the central bond (j -> k), the torsion is positive when the front bond (j-i)
    # turns clockwise, by less than 180 deg, to eclipse the back bond (k-l). Here j -> k is +z; seen from
    # below, the front bond at 45 deg in the xy plane reaches the back bond at 0 deg turning anticlockwise.
    positions = np.array([[1.0, 1.0, 0.0], [0.0, 0.0, 0.0], [0.0, 0.0, 1.0], [1.0, 0.0, 1.0]])
    assert dihedral_angles(positions, [(0, 1, 2, 3)])[0] == pytest.approx(-math.pi / 4)
    assert _numpy_torsion(*positions) == pytest.approx(-math.pi / 4)
    assert _openmm_torsions(4, positions, [(0, 1, 2, 3)])[0] == pytest.approx(-math.pi / 4, abs=1e-6)


def test_dihedral_angles_agree_with_openmm_on_random_points():
    rng = np.random.default_rng(11)
    positions = rng.normal(scale=0.2, size=(8, 3))
    quads = [tuple(rng.permutation(8)[:4]) for _ in range(6)]
    expected = _openmm_torsions(8, positions, quads)
    np.testing.assert_allclose(dihedral_angles(positions, quads), expected, atol=1e-6)


def test_angles_accept_quantities_and_reject_bad_values():
    _, positions_rad, _ = build_dipeptide(math.radians(-60.0), math.radians(140.0))
    _, positions_deg, _ = build_dipeptide(-60.0 * unit.degree, 140.0 * unit.degree)
    np.testing.assert_allclose(positions_deg, positions_rad, atol=1e-12)
    with pytest.raises(ParameterError, match="phi must be finite"):
        build_dipeptide(float("nan"))
    with pytest.raises(ParameterError, match="psi must be an angle"):
        build_dipeptide(psi=1.0 * unit.nanometer)
    with pytest.raises(ParameterError, match="omega must be a number"):
        build_dipeptide(omega="trans")


def test_alanine_is_the_l_enantiomer(c7eq):
    # L-alanine is (S) (Cahn-Ingold-Prelog priorities N > C' > CB > H). Check the sign of the chirality
    # volume (N-CA).((C-CA)x(CB-CA)) against the natural (L) residues of the villin headpiece structure that
    # ships with OpenMM (app/data/test.pdb).
    def chirality(topology, positions, residue):
        atoms = {a.name: a.index for a in residue.atoms()}
        n, ca, c, cb = (positions[atoms[k]] for k in ("N", "CA", "C", "CB"))
        return np.sign(np.dot(n - ca, np.cross(c - ca, cb - ca)))

    villin = app.PDBFile(os.path.join(os.path.dirname(app.__file__), "data", "test.pdb"))
    villin_xyz = villin.getPositions(asNumpy=True).value_in_unit(unit.nanometer)
    natural = {chirality(villin.topology, villin_xyz, r) for r in villin.topology.residues()
               if r.name not in ("GLY", "HOH") and {"N", "CA", "C", "CB"} <= {a.name for a in r.atoms()}}
    assert len(natural) == 1
    topology, positions, _, minimised, _ = c7eq
    (ala,) = [r for r in topology.residues() if r.name == "ALA"]
    assert chirality(topology, positions, ala) == natural.pop()
    assert chirality(topology, minimised, ala) == chirality(topology, positions, ala)


@pytest.mark.parametrize("which", ["built", "minimised"])
def test_bond_lengths_near_force_field_equilibrium(c7eq, which):
    topology, positions, system, minimised, _ = c7eq
    xyz = positions if which == "built" else minimised
    targets = _bond_targets(system)
    assert len(targets) == 21
    for atom_a, atom_b in topology.bonds():
        r0 = targets[frozenset((atom_a.index, atom_b.index))]
        r = np.linalg.norm(xyz[atom_a.index] - xyz[atom_b.index])
        assert abs(r / r0 - 1) < 0.03, f"{atom_a} - {atom_b}: {r:.4f} nm vs r0 {r0:.4f} nm"


def test_minimised_structure_is_a_sensible_c7eq(c7eq):
    topology, _, system, minimised, energy = c7eq
    assert np.isfinite(energy)
    # a minimum: minimising again (tighter) gains almost nothing (raw forces are not zero: constraints)
    _, energy_again = minimize(system, minimised, tolerance=0.1)
    assert energy - 0.1 < energy_again <= energy + 1e-6
    # No clash: atoms more than two bonds apart stay farther than 0.17 nm (a hydrogen bond's H...O distance
    # is ~0.18-0.20 nm, H...H van der Waals contact ~0.24 nm; common practice, not a sourced cutoff).
    neighbours = {a.index: set() for a in topology.atoms()}
    for a, b in topology.bonds():
        neighbours[a.index].add(b.index)
        neighbours[b.index].add(a.index)
    for i in range(22):
        near = neighbours[i] | {k for j in neighbours[i] for k in neighbours[j]}
        for j in range(i + 1, 22):
            if j not in near:
                assert np.linalg.norm(minimised[i] - minimised[j]) > 0.17, (i, j)
    # C7eq: phi ~ -80, psi ~ 60-90 deg with the seven-membered-ring hydrogen bond O(ACE)...H-N(NME)
    # (Tobias & Brooks, J. Phys. Chem. 96, 3864 (1992), CHARMM: (-77.5, 89.9)).
    phi, psi = np.degrees(dihedral_angles(minimised, backbone_dihedral_atoms(topology)))
    assert -110 < phi < -50 and 30 < psi < 110, (phi, psi)
    oxygen, hydrogen = _atom_index(topology, "ACE", "O"), _atom_index(topology, "NME", "H")
    h_bond = np.linalg.norm(minimised[oxygen] - minimised[hydrogen])
    assert h_bond < 0.25, h_bond


def _nve_energy_stats(system, positions, velocities, timestep, duration):
    integrator = openmm.VerletIntegrator(timestep * unit.picoseconds)
    context = openmm.Context(system, integrator, REFERENCE)
    context.setPositions(positions)
    context.setVelocities(velocities)
    total, kinetic = [], []
    for _ in range(int(round(duration / timestep / 5))):
        integrator.step(5)
        state = context.getState(getEnergy=True)
        kinetic.append(state.getKineticEnergy().value_in_unit(KJ))
        total.append(kinetic[-1] + state.getPotentialEnergy().value_in_unit(KJ))
    total = np.array(total)
    drift = np.polyfit(np.arange(total.size) * 5 * timestep, total, 1)[0]
    return np.std(total) / np.std(kinetic), drift


def test_timestep_is_safe_with_hbond_constraints(c7eq):
    # Energy conservation in NVE (velocity Verlet) at 300 K: the total-energy fluctuation must be small next
    # to the kinetic-energy fluctuation and shrink as dt^2 (a second-order integrator in its asymptotic
    # regime, no resonance). Thresholds are common practice, not sourced.
    topology, _, system, minimised, _ = c7eq
    simulation = make_simulation(topology, system, minimised, temperature=300.0, seed=3)
    simulation.step(500)
    state = simulation.context.getState(getPositions=True, getVelocities=True)
    start = (state.getPositions(), state.getVelocities())
    ratio_2fs, drift_2fs = _nve_energy_stats(system, *start, TIMESTEP, 2.0)
    ratio_1fs, _ = _nve_energy_stats(system, *start, TIMESTEP / 2, 2.0)
    assert ratio_2fs < 0.1, ratio_2fs
    assert abs(drift_2fs) < 0.5, drift_2fs  # kJ/mol/ps
    assert 2.5 < ratio_2fs / ratio_1fs < 6.0, (ratio_2fs, ratio_1fs)


def test_unbiased_run_stays_on_the_negative_phi_side(c7eq):
    # Sanity: the phi barrier between the C7eq/C5 region (phi < 0) and C7ax/alphaL (phi > 0) is tens of
    # kJ/mol (from memory: 30-40), so 5 ps at 300 K should never cross it.
    topology, _, system, minimised, _ = c7eq
    quads = backbone_dihedral_atoms(topology)
    simulation = make_simulation(topology, system, minimised, temperature=300.0, seed=5)
    phis = []
    for _ in range(250):
        simulation.step(10)
        state = simulation.context.getState(getPositions=True)
        xyz = state.getPositions(asNumpy=True).value_in_unit(unit.nanometer)
        phis.append(dihedral_angles(xyz, quads)[0])
    assert np.all(np.isfinite(phis)) and max(phis) < 0.0, np.degrees(max(phis))


def test_make_simulation_is_reproducible_with_a_seed(c7eq):
    topology, _, system, minimised, _ = c7eq
    runs = []
    for _ in range(2):
        simulation = make_simulation(topology, system, minimised, seed=9)
        simulation.step(50)
        runs.append(simulation.context.getState(getPositions=True).getPositions(asNumpy=True)._value)
    np.testing.assert_array_equal(runs[0], runs[1])
    with pytest.raises(ParameterError, match="timestep must be <= 0.002"):
        make_simulation(topology, system, minimised, timestep=0.004)
    with pytest.raises(ParameterError, match="platform must be one of"):
        make_simulation(topology, system, minimised, platform="Fast")
    with pytest.raises(ParameterError, match="seed must be"):
        make_simulation(topology, system, minimised, seed=-1)


def test_fastest_platform_returns_the_best_measured_rate(c7eq):
    _, _, system, minimised, _ = c7eq
    name, rates = fastest_platform(system, minimised, seconds=0.05)
    assert set(rates) <= {"Reference", "CPU"} and "Reference" in rates
    assert all(rate > 0 for rate in rates.values())
    assert rates[name] == max(rates.values())


def test_fastest_platform_rejects_bad_candidates(c7eq):
    _, _, system, minimised, _ = c7eq
    with pytest.raises(ParameterError, match="unknown platform 'Quick'"):
        fastest_platform(system, minimised, ("Reference", "Quick"))
    with pytest.raises(ParameterError, match="non-empty"):
        fastest_platform(system, minimised, ())
    with pytest.raises(ParameterError, match="seconds must be"):
        fastest_platform(system, minimised, seconds=0.0)
    available = {openmm.Platform.getPlatform(i).getName() for i in range(openmm.Platform.getNumPlatforms())}
    missing = [p for p in ("CUDA", "OpenCL", "HIP") if p not in available]
    if missing:
        with pytest.raises(ParameterError, match="none of"):
            fastest_platform(system, minimised, (missing[0],))
