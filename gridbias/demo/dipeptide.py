"""The blocked alanine dipeptide (ACE-ALA-NME, 22 atoms) in vacuum, built from internal coordinates.

The structure is generated here, not read from a file: a small NeRF builder (natural extension
reference frame) places each atom from a bond length, a bond angle and a torsion relative to three atoms
already placed (Parsons et al., J. Comput. Chem. 26, 1063 (2005), from memory), so any backbone
conformation (phi, psi, omega) can be built exactly.

Force-field settings (amber14-all.xml from OpenMM's package data, ff14SB protein parameters):

- ``NoCutoff``: a lone 22-atom molecule in vacuum has no periodic box, and with 231 atom pairs every
  non-bonded interaction is cheap to compute exactly; any cutoff would only add truncation artefacts.
- ``HBonds`` constraints with a 2 fs Langevin step (:data:`TIMESTEP`). X-H bond vibrations (period
  ~10 fs) are what limits the step of a flexible model to ~0.5-1 fs; constraining them allows 2 fs
  (common practice for Amber force fields). They do not touch the backbone dihedrals the bias acts on.
  Measured here (velocity Verlet, 10 ps): std(total energy) / std(kinetic energy) is 0.07 with HBonds at
  2 fs, 0.22 for the flexible model at 2 fs and 0.04 for it at 1 fs, so HBonds at 2 fs conserves energy
  about as well as the flexible model at half the step; ``tests/engine/test_dipeptide_system.py`` keeps checking it.

Cautions: ff14SB was fitted for use with explicit water; in vacuum it gives a plausible but force-field-
specific surface (no solvent screening, so the intramolecular hydrogen bond of the C7 conformers is
strong). Free energies from this demo illustrate the method; they are not a validated physical result.
"""

from __future__ import annotations

import io
import math
import time

import numpy as np

from .._files import write_atomically
from ..errors import OutputError, ParameterError
from ..openmm._units import in_md_units, is_quantity

__all__ = [
    "DEFAULT_PHI",
    "DEFAULT_PSI",
    "DEFAULT_OMEGA",
    "TIMESTEP",
    "FRICTION",
    "FORCE_FIELD",
    "build_dipeptide",
    "backbone_dihedral_atoms",
    "dihedral_angles",
    "minimize",
    "make_simulation",
    "fastest_platform",
    "write_pdb",
]

DEFAULT_PHI = math.radians(-80.0)
"""Starting phi (rad): the C7eq basin."""
DEFAULT_PSI = math.radians(70.0)
"""Starting psi (rad): the C7eq basin."""
DEFAULT_OMEGA = math.pi
"""Peptide-bond torsion CA-C-N-CA (rad): trans."""
TIMESTEP = 0.002
"""Integration step (ps), safe with HBonds constraints."""
FRICTION = 1.0
"""Langevin friction (1/ps), common practice for sampling."""
FORCE_FIELD = "amber14-all.xml"
"""The OpenMM force-field file the system is built with."""

_PLATFORM_NAMES = ("Reference", "CPU", "CUDA", "OpenCL", "HIP")

# Ideal geometry in nm and degrees. Backbone values: Engh & Huber, Acta Cryst. A47, 392 (1991), from
# memory; C-H 0.109 nm, N-H 0.101 nm and tetrahedral 109.5 deg are common practice. The structure is
# minimised with the force field before use, so these only need to be close.
_R_CC = 0.1525  # C(sp3)-C(carbonyl)
_R_CN = 0.1329  # peptide C-N
_R_NC = 0.1458  # N-C(sp3)
_R_CO = 0.1231  # C=O
_R_CB = 0.1530  # CA-CB
_R_CH = 0.1090
_R_NH = 0.1010
_A_CCN = 116.2  # C(sp3)-C-N
_A_CNC = 121.7  # C-N-C(sp3)
_A_NCC = 111.2  # N-CA-C
_A_NCO = 123.0  # N-C=O
_A_CCO = 120.8  # C(sp3)-C=O
_A_NCB = 110.5  # N-CA-CB
_A_CNH = 119.0  # C-N-H
_A_TET = 109.5

# The residues, and the atoms in building order:
# (residue index, atom name, element symbol, reference atoms a, b, c as "RES:NAME", bond c-x (nm),
# angle b-c-x (deg), torsion a-b-c-x). A torsion is a number (deg) or a conformational angle plus an optional
# offset in degrees ("phi+120").
_RESIDUES = ("ACE", "ALA", "NME")
_ATOMS = (
    (0, "CH3", "C", None, None, None, None, None, None),
    (0, "C", "C", None, None, None, None, None, None),
    (1, "N", "N", None, None, None, None, None, None),
    (1, "CA", "C", "ACE:CH3", "ACE:C", "ALA:N", _R_NC, _A_CNC, "omega"),
    (1, "C", "C", "ACE:C", "ALA:N", "ALA:CA", _R_CC, _A_NCC, "phi"),
    (2, "N", "N", "ALA:N", "ALA:CA", "ALA:C", _R_CN, _A_CCN, "psi"),
    (2, "C", "C", "ALA:CA", "ALA:C", "NME:N", _R_NC, _A_CNC, "omega"),
    (0, "O", "O", "ALA:CA", "ALA:N", "ACE:C", _R_CO, _A_NCO, 0.0),
    (0, "H1", "H", "ALA:N", "ACE:C", "ACE:CH3", _R_CH, _A_TET, 180.0),
    (0, "H2", "H", "ALA:N", "ACE:C", "ACE:CH3", _R_CH, _A_TET, 60.0),
    (0, "H3", "H", "ALA:N", "ACE:C", "ACE:CH3", _R_CH, _A_TET, -60.0),
    (1, "H", "H", "ACE:O", "ACE:C", "ALA:N", _R_NH, _A_CNH, 180.0),
    (1, "CB", "C", "ACE:C", "ALA:N", "ALA:CA", _R_CB, _A_NCB, "phi-120"),
    (1, "HA", "H", "ACE:C", "ALA:N", "ALA:CA", _R_CH, _A_TET, "phi+120"),
    (1, "HB1", "H", "ALA:N", "ALA:CA", "ALA:CB", _R_CH, _A_TET, 180.0),
    (1, "HB2", "H", "ALA:N", "ALA:CA", "ALA:CB", _R_CH, _A_TET, 60.0),
    (1, "HB3", "H", "ALA:N", "ALA:CA", "ALA:CB", _R_CH, _A_TET, -60.0),
    (1, "O", "O", "ALA:N", "ALA:CA", "ALA:C", _R_CO, _A_CCO, "psi+180"),
    (2, "H", "H", "ALA:O", "ALA:C", "NME:N", _R_NH, _A_CNH, 180.0),
    (2, "H1", "H", "ALA:C", "NME:N", "NME:C", _R_CH, _A_TET, 180.0),
    (2, "H2", "H", "ALA:C", "NME:N", "NME:C", _R_CH, _A_TET, 60.0),
    (2, "H3", "H", "ALA:C", "NME:N", "NME:C", _R_CH, _A_TET, -60.0),
)
_N_ATOMS = len(_ATOMS)
# Topology order: residue by residue (OpenMM needs each residue's atoms contiguous), building order within.
_TOPOLOGY_ORDER = tuple(sorted(range(_N_ATOMS), key=lambda n: _ATOMS[n][0]))


def _require_openmm():
    try:
        import openmm
        from openmm import app, unit
    except ImportError as exc:  # pragma: no cover - depends on the environment
        raise ImportError(
            "the dipeptide demo needs OpenMM; install it with: pip install 'gridbias[openmm]'"
        ) from exc
    return openmm, app, unit


def _angle_rad(name, value):
    """A finite angle in radians from a float (rad) or an ``openmm.unit`` quantity."""
    if is_quantity(value):
        _require_openmm()
        try:
            value = in_md_units(value, name=name, unit="radian")
        except ParameterError as exc:
            raise ParameterError(f"{name} must be an angle, got {value!r}") from exc
    try:
        rad = float(value)
    except (TypeError, ValueError) as exc:
        raise ParameterError(f"{name} must be a number (rad) or an angle quantity, got {value!r}") from exc
    if not math.isfinite(rad):
        raise ParameterError(f"{name} must be finite, got {rad}")
    return rad


def _place(a, b, c, bond, angle_deg, torsion_rad):
    """Position of atom x bonded to c, with |cx| = bond, angle b-c-x and torsion a-b-c-x (NeRF)."""
    bc = c - b
    bc /= np.linalg.norm(bc)
    n = np.cross(b - a, bc)
    n /= np.linalg.norm(n)
    m = np.cross(n, bc)
    theta = math.radians(angle_deg)
    local = np.array(
        [-bond * math.cos(theta),
         bond * math.sin(theta) * math.cos(torsion_rad),
         bond * math.sin(theta) * math.sin(torsion_rad)]
    )
    return c + local[0] * bc + local[1] * m + local[2] * n


def _torsion(spec, angles):
    if isinstance(spec, float):
        return math.radians(spec)
    for sign in "+-":
        if sign in spec:
            key, offset = spec.split(sign)
            return angles[key] + math.radians(float(sign + offset))
    return angles[spec]


def _build_positions(phi, psi, omega):
    """Positions (22, 3) in nm, in topology order."""
    angles = {"phi": phi, "psi": psi, "omega": omega}
    xyz_by_key = {}
    xyz_n3 = np.zeros((_N_ATOMS, 3))
    # The first three atoms fix the frame: CH3 at the origin, C on +x, N in the xy plane.
    xyz_n3[1] = [_R_CC, 0.0, 0.0]
    t = math.radians(180.0 - _A_CCN)
    xyz_n3[2] = xyz_n3[1] + _R_CN * np.array([math.cos(t), math.sin(t), 0.0])
    for n, (res, name, _, ra, rb, rc, bond, angle, torsion) in enumerate(_ATOMS):
        if n >= 3:
            a, b, c = (xyz_by_key[ref] for ref in (ra, rb, rc))
            xyz_n3[n] = _place(a, b, c, bond, angle, _torsion(torsion, angles))
        xyz_by_key[f"{_RESIDUES[res]}:{name}"] = xyz_n3[n]
    return xyz_n3[list(_TOPOLOGY_ORDER)]


def _build_topology():
    _, app, _ = _require_openmm()
    topology = app.Topology()
    chain = topology.addChain("A")
    residues = [topology.addResidue(name, chain, id=str(i + 1)) for i, name in enumerate(_RESIDUES)]
    for n in _TOPOLOGY_ORDER:
        res, name, symbol = _ATOMS[n][:3]
        topology.addAtom(name, app.Element.getBySymbol(symbol), residues[res])
    # Bonds come from OpenMM's own standard-residue definitions, so wrong atom names fail here.
    topology.createStandardBonds()
    n_bonds = topology.getNumBonds()
    if n_bonds != _N_ATOMS - 1:  # pragma: no cover - guards the atom table above
        raise RuntimeError(f"the dipeptide topology has {n_bonds} bonds, expected {_N_ATOMS - 1}")
    return topology


def build_dipeptide(phi=DEFAULT_PHI, psi=DEFAULT_PSI, *, omega=DEFAULT_OMEGA):
    """Build ACE-ALA-NME in a chosen backbone conformation, with its amber14 vacuum system.

    Parameters
    ----------
    phi, psi : float (rad) or openmm.unit angle quantity
        Backbone torsions of the alanine: phi = C(ACE)-N-CA-C, psi = N-CA-C-N(NME), IUPAC-IUB 1970
        convention. Defaults (-80, 70) degrees lie in the C7eq basin.
    omega : float (rad) or openmm.unit angle quantity, optional
        Torsion of both peptide bonds (CA-C-N-CA, with the methyl carbons of the caps); default pi (trans).

    Returns
    -------
    topology : openmm.app.Topology
        One chain, residues ACE, ALA, NME (22 atoms, hydrogens included), standard atom names.
    positions : (22, 3) float ndarray, nm
        Ideal-geometry positions (not minimised); the torsions are exactly the ones requested.
    system : openmm.System
        amber14-all.xml (ff14SB), ``NoCutoff``, ``HBonds`` constraints, no box. Use a step of at most
        :data:`TIMESTEP` (2 fs).

    Raises
    ------
    ParameterError
        If an angle is not a finite number or angle quantity.
    ImportError
        If OpenMM is not installed.

    Examples
    --------
    >>> topology, positions, system = build_dipeptide()
    >>> topology.getNumAtoms(), positions.shape
    (22, (22, 3))
    """
    phi, psi, omega = (_angle_rad(k, v) for k, v in (("phi", phi), ("psi", psi), ("omega", omega)))
    _, app, _ = _require_openmm()
    topology = _build_topology()
    positions = _build_positions(phi, psi, omega)
    forcefield = app.ForceField(FORCE_FIELD)
    system = forcefield.createSystem(topology, nonbondedMethod=app.NoCutoff, constraints=app.HBonds)
    return topology, positions, system


def backbone_dihedral_atoms(topology):
    """Atom indices of the phi and psi torsions of the one amino-acid residue between two caps.

    Parameters
    ----------
    topology : openmm.app.Topology
        Must contain exactly one residue with atoms N, CA and C whose neighbours in the chain have a C
        (before) and an N (after), as in ACE-ALA-NME.

    Returns
    -------
    phi_atoms, psi_atoms : tuple of 4 int
        (C_prev, N, CA, C) and (N, CA, C, N_next), 0-based atom indices.

    Raises
    ------
    ParameterError
        If no such residue, or more than one, is found, or the atoms are not bonded in a chain.
    """
    found = []
    for chain in topology.chains():
        residues = list(chain.residues())
        for i in range(1, len(residues) - 1):
            prev, res, nxt = residues[i - 1], residues[i], residues[i + 1]
            names = {a.name: a.index for a in res.atoms()}
            prev_c = [a.index for a in prev.atoms() if a.name == "C"]
            next_n = [a.index for a in nxt.atoms() if a.name == "N"]
            if {"N", "CA", "C"} <= names.keys() and len(prev_c) == 1 and len(next_n) == 1:
                found.append((prev_c[0], names["N"], names["CA"], names["C"], next_n[0], res))
    if len(found) != 1:
        raise ParameterError(
            f"topology must have exactly one residue with N, CA, C between a residue with C and one with N; "
            f"found {len(found)}"
        )
    c_prev, n, ca, c, n_next, res = found[0]
    bonded = {frozenset((a.index, b.index)) for a, b in topology.bonds()}
    for pair in ((c_prev, n), (n, ca), (ca, c), (c, n_next)):
        if frozenset(pair) not in bonded:
            raise ParameterError(
                f"topology: atoms {pair} of the backbone around residue {res.name} are not bonded"
            )
    return (c_prev, n, ca, c), (n, ca, c, n_next)


def dihedral_angles(positions, quads):
    """Torsion angles of atom quadruples, IUPAC sign convention (as OpenMM computes them).

    Parameters
    ----------
    positions : (n, 3) float array-like, nm
    quads : (k, 4) int array-like
        Atom indices (i, j, k, l) per torsion.

    Returns
    -------
    angles : (k,) float ndarray, rad, in (-pi, pi]

    Notes
    -----
    With b1 = p_j - p_i, b2 = p_k - p_j, b3 = p_l - p_k:
    angle = atan2(|b2| b1 . (b2 x b3), (b1 x b2) . (b2 x b3)).
    """
    xyz_n3 = np.asarray(positions, dtype=float)
    quads_k4 = np.asarray(quads, dtype=np.int64)
    if xyz_n3.ndim != 2 or xyz_n3.shape[1] != 3:
        raise ParameterError(f"positions must have shape (n, 3), got {xyz_n3.shape}")
    if quads_k4.ndim != 2 or quads_k4.shape[1] != 4:
        raise ParameterError(f"quads must have shape (k, 4), got {quads_k4.shape}")
    if quads_k4.size and (quads_k4.min() < 0 or quads_k4.max() >= xyz_n3.shape[0]):
        raise ParameterError(f"quads must index atoms 0..{xyz_n3.shape[0] - 1}, got {quads_k4.tolist()}")
    p = xyz_n3[quads_k4]  # (k, 4, 3)
    b1, b2, b3 = p[:, 1] - p[:, 0], p[:, 2] - p[:, 1], p[:, 3] - p[:, 2]
    n1, n2 = np.cross(b1, b2), np.cross(b2, b3)
    y = np.linalg.norm(b2, axis=1) * np.einsum("ij,ij->i", b1, n2)
    x = np.einsum("ij,ij->i", n1, n2)
    return np.arctan2(y, x)


def _platform(name):
    openmm, _, _ = _require_openmm()
    if name not in _PLATFORM_NAMES:
        raise ParameterError(f"platform must be one of {_PLATFORM_NAMES}, got {name!r}")
    try:
        return openmm.Platform.getPlatformByName(name)
    except Exception as exc:
        raise ParameterError(f"platform {name!r} is not available in this OpenMM installation") from exc


def _integrator(temperature, timestep, friction, seed):
    openmm, _, unit = _require_openmm()
    for name, value in (("temperature", temperature), ("timestep", timestep), ("friction", friction)):
        if not (isinstance(value, (int, float)) and math.isfinite(value) and value > 0):
            raise ParameterError(f"{name} must be a positive finite number, got {value!r}")
    if timestep > TIMESTEP:
        raise ParameterError(f"timestep must be <= {TIMESTEP} ps (HBonds constraints), got {timestep}")
    integrator = openmm.LangevinMiddleIntegrator(
        temperature * unit.kelvin, friction / unit.picosecond, timestep * unit.picoseconds
    )
    if seed is not None:
        integrator.setRandomNumberSeed(_seed(seed))
    return integrator


def _seed(seed):
    if isinstance(seed, bool) or not isinstance(seed, (int, np.integer)) or not 1 <= seed < 2**31:
        raise ParameterError(f"seed must be None or an integer in 1..2**31-1, got {seed!r}")
    return int(seed)


def _check_positions(positions, system):
    xyz_n3 = np.asarray(positions, dtype=float)
    if xyz_n3.shape != (system.getNumParticles(), 3) or not np.all(np.isfinite(xyz_n3)):
        raise ParameterError(
            f"positions must be finite with shape ({system.getNumParticles()}, 3) nm, "
            f"got shape {xyz_n3.shape}"
        )
    return xyz_n3


def minimize(system, positions, *, platform="Reference", tolerance=1.0, max_iterations=0):
    """Minimise the potential energy (L-BFGS, OpenMM's minimiser).

    Parameters
    ----------
    system : openmm.System
    positions : (n, 3) float array-like, nm
    platform : str, optional
        OpenMM platform name; default "Reference" (deterministic).
    tolerance : float, optional
        Convergence criterion: root-mean-square force, kJ/mol/nm.
    max_iterations : int, optional
        0 means until converged.

    Returns
    -------
    positions : (n, 3) float ndarray, nm
    energy : float
        Potential energy at the minimum, kJ/mol.
    """
    openmm, _, unit = _require_openmm()
    xyz_n3 = _check_positions(positions, system)
    if not (isinstance(tolerance, (int, float)) and tolerance > 0):
        raise ParameterError(f"tolerance must be a positive number (kJ/mol/nm), got {tolerance!r}")
    if isinstance(max_iterations, bool) or not isinstance(max_iterations, int) or max_iterations < 0:
        raise ParameterError(f"max_iterations must be an integer >= 0, got {max_iterations!r}")
    context = openmm.Context(system, openmm.VerletIntegrator(0.001), _platform(platform))
    context.setPositions(xyz_n3 * unit.nanometer)
    openmm.LocalEnergyMinimizer.minimize(
        context, tolerance * unit.kilojoule_per_mole / unit.nanometer, max_iterations
    )
    state = context.getState(getPositions=True, getEnergy=True)
    return (
        np.asarray(in_md_units(state.getPositions(asNumpy=True))),
        float(in_md_units(state.getPotentialEnergy())),
    )


def make_simulation(topology, system, positions, *, temperature=300.0, platform="Reference", seed=None,
                    timestep=TIMESTEP, friction=FRICTION):
    """A Langevin simulation (LangevinMiddleIntegrator) ready to step, velocities drawn at temperature.

    Parameters
    ----------
    topology : openmm.app.Topology
    system : openmm.System
        Add any bias force before calling this.
    positions : (n, 3) float array-like, nm
    temperature : float, optional
        K.
    platform : str, optional
        OpenMM platform name (see :func:`fastest_platform`).
    seed : int or None, optional
        Seeds both the velocities and the integrator's random forces (1..2**31-1); None lets OpenMM pick.
    timestep : float, optional
        ps, at most :data:`TIMESTEP`.
    friction : float, optional
        1/ps.

    Returns
    -------
    openmm.app.Simulation
    """
    _, app, unit = _require_openmm()
    xyz_n3 = _check_positions(positions, system)
    integrator = _integrator(temperature, timestep, friction, seed)
    simulation = app.Simulation(topology, system, integrator, _platform(platform))
    simulation.context.setPositions(xyz_n3 * unit.nanometer)
    if seed is None:
        simulation.context.setVelocitiesToTemperature(temperature * unit.kelvin)
    else:
        simulation.context.setVelocitiesToTemperature(temperature * unit.kelvin, _seed(seed))
    return simulation


def fastest_platform(system, positions, candidates=("Reference", "CPU"), *, seconds=0.5, temperature=300.0,
                     timestep=TIMESTEP, attach=None, stride=500):
    """Time Langevin steps on each available platform and return the fastest.

    For a system this small, per-step overheads dominate, so the ranking depends on the machine and on
    the forces in the system: time it as it will run. With ``attach``, each platform is timed on a copy
    of ``system`` carrying the bias that platform would run (the adapter picks its route per platform),
    depositing every ``stride`` steps.

    Parameters
    ----------
    system : openmm.System
    positions : (n, 3) float array-like, nm
        Preferably minimised.
    candidates : sequence of str, optional
        Platform names to try; ones missing from this OpenMM installation are skipped.
    seconds : float, optional
        Timing budget per platform after a short warm-up (s); 0.05 to 60.
    temperature : float, optional
        K.
    timestep : float, optional
        ps.
    attach : callable, optional
        ``attach(system_copy, platform_name) -> gridbias.openmm.BiasLink``: adds the bias to a copy of
        the system for one platform (give it a copy of the bias: the probe deposits hills).
    stride : int, optional
        Steps between the probe's deposits when ``attach`` is given.

    Returns
    -------
    name : str
        The platform with the most steps per second.
    steps_per_second : dict[str, float]
        Measured rate for each available candidate.

    Raises
    ------
    ParameterError
        For an unknown platform name, an empty candidate list, none available, or a bad time budget.
    """
    openmm, _, unit = _require_openmm()
    xyz_n3 = _check_positions(positions, system)
    if isinstance(candidates, str) or len(candidates) == 0:
        raise ParameterError(f"candidates must be a non-empty sequence of platform names, got {candidates!r}")
    for name in candidates:
        if name not in _PLATFORM_NAMES:
            raise ParameterError(f"candidates: unknown platform {name!r}; allowed: {_PLATFORM_NAMES}")
    if not (isinstance(seconds, (int, float)) and 0.05 <= seconds <= 60):
        raise ParameterError(f"seconds must be between 0.05 and 60, got {seconds!r}")
    if attach is not None and not callable(attach):
        raise ParameterError(f"attach must be a callable (system, platform_name) -> BiasLink, got {attach!r}")
    if isinstance(stride, bool) or not isinstance(stride, int) or stride < 1:
        raise ParameterError(f"stride must be an integer number of steps >= 1, got {stride!r}")
    available = {openmm.Platform.getPlatform(i).getName() for i in range(openmm.Platform.getNumPlatforms())}
    rates = {}
    for name in candidates:
        if name not in available or name in rates:
            continue
        integrator = _integrator(temperature, timestep, FRICTION, seed=1)
        timed_system, link = system, None
        if attach is not None:
            timed_system = openmm.XmlSerializer.deserialize(openmm.XmlSerializer.serialize(system))
            link = attach(timed_system, name)
        context = openmm.Context(timed_system, integrator, openmm.Platform.getPlatformByName(name))
        context.setPositions(xyz_n3 * unit.nanometer)
        context.setVelocitiesToTemperature(temperature * unit.kelvin, 1)
        integrator.step(10)  # warm-up: kernels compiled, caches filled
        if link is not None:
            link.deposit(context)  # the first deposit binds the link (one table push)
        steps, chunk = 0, 10
        start = time.perf_counter()
        while (elapsed := time.perf_counter() - start) < seconds:
            if link is None:
                integrator.step(chunk)
                steps += chunk
                chunk = min(2 * chunk, 1000)
            else:
                integrator.step(stride)
                link.deposit(context)
                steps += stride
        rates[name] = steps / elapsed
        del context, integrator, link
    if not rates:
        raise ParameterError(
            f"candidates: none of {tuple(candidates)} is available; available: {sorted(available)}"
        )
    return max(rates, key=rates.get), rates


def write_pdb(path, topology, positions):
    """Write a structure to a PDB file with OpenMM's writer (3 decimals in Angstrom).

    Parameters
    ----------
    path : str or os.PathLike
    topology : openmm.app.Topology
    positions : (n, 3) float array-like, nm
    """
    _, app, unit = _require_openmm()
    xyz_n3 = np.asarray(positions, dtype=float)
    if xyz_n3.shape != (topology.getNumAtoms(), 3):
        raise ParameterError(f"positions must have shape ({topology.getNumAtoms()}, 3), got {xyz_n3.shape}")
    text = io.StringIO()
    app.PDBFile.writeFile(topology, xyz_n3 * unit.nanometer, text)
    write_atomically(path, text.getvalue().encode("utf-8"), what="PDB file", error=OutputError)
