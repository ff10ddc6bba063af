"""Nuclear relaxation in a static field ([response] nuclear_relaxation).

Checks against quantities that share no code with fieldprop's relaxation:

- the field-dependent nuclear gradient against central differences of
  E(R; F) computed here with PySCF alone (field term written in the test: the
  electrons' +F.(r - O) and the nuclei's -F.sum Z_A (R_A - O));
- a diatomic's alpha^nr along the bond against (dmu/dR)^2 / k, the
  double-harmonic relation (Bishop, Rev. Mod. Phys. 62, 343 (1990)), with
  dmu/dR from central differences of PySCF's analytic SCF dipoles and k from
  PySCF's analytic Hessian; the perpendicular components vanish;
- a polyatomic's alpha^nr against the double-harmonic sum over normal modes
  sum_a (dmu/dQ_a)^2 / omega_a^2 (mass-weighted analytic Hessian with the
  translations and rotations projected out, the standard harmonic analysis;
  dipole derivatives by central differences of PySCF dipoles);
- beta^nr = 0 for a centrosymmetric molecule (symmetry off, so nothing is set
  to zero by the planner);
- the Eckart conditions on every relaxed structure (computed here with NumPy).

For alpha the finite-field relaxation and the double-harmonic sum are the same
quantity (the first-order relaxation is harmonic; anharmonicity enters beta),
so they must agree within the error bars plus the references' own
finite-difference error.
"""

import json
import textwrap

import numpy as np
import pytest

from fieldprop.cli import main

pytest.importorskip("pyscf")


def _mol(symbols, coords_bohr, basis, charge=0, spin=0):
    from pyscf import gto

    return gto.M(atom=list(zip(symbols, coords_bohr)), unit="Bohr", basis=basis,
                 charge=charge, spin=spin, verbose=0)


def _energy(symbols, coords_bohr, kind, field, origin, basis="6-31g", charge=0, spin=0):
    """E(R; F) with PySCF alone: +F.(r - O) on the electrons, -F.sum Z (R - O) on
    the nuclei."""
    from pyscf import dft, mp, scf

    mol = _mol(symbols, coords_bohr, basis, charge, spin)
    make = {"rhf": scf.RHF, "uhf": scf.UHF, "rks": dft.RKS, "uks": dft.UKS,
            "mp2": scf.RHF}[kind]
    mf = make(mol)
    if kind in ("rks", "uks"):
        mf.xc = "pbe"
        mf.grids.level = 3
    with mol.with_common_orig(origin):
        r = mol.intor_symmetric("int1e_r", comp=3)
    h = mf.get_hcore() + np.einsum("x,xij->ij", field, r)
    e_nuc = mol.energy_nuc() - field @ (mol.atom_charges() @ (mol.atom_coords() - origin))
    mf.get_hcore = lambda *args: h
    mf.energy_nuc = lambda *args: e_nuc
    # An orbital gradient of 1e-7 leaves the energy ~1e-14 Eh off: 1e-10 Eh/bohr
    # in a central difference over 2e-4 bohr.
    mf.conv_tol, mf.conv_tol_grad = 1e-12, 1e-7
    mf.kernel()
    if not mf.converged:
        mf = mf.newton()
        mf.kernel(mf.make_rdm1())
    assert mf.converged
    if kind == "mp2":
        return mp.MP2(mf).run(verbose=0).e_tot
    return mf.e_tot


# A bent triatomic off every axis, not at a minimum (large gradients test more).
_SYMBOLS = ("O", "H", "H")
_COORDS = np.array([[0.05, 0.1, 0.2], [1.4, 1.1, -0.1], [-1.5, 1.0, 0.35]])
_FIELD = np.array([0.004, -0.003, 0.005])  # off every axis
_ORIGIN = np.array([0.1, 0.2, -0.1])


@pytest.mark.parametrize("kind, charge, spin", [
    ("rhf", 0, 0), ("rks", 0, 0), ("uhf", 1, 1), ("uks", 1, 1), ("mp2", 0, 0)],
    ids=["RHF", "RKS-PBE", "UHF-cation", "UKS-PBE-cation", "MP2"])
def test_the_field_gradient_is_the_derivative_of_the_field_energy(kind, charge, spin):
    from fieldprop.backend import StructureEvaluator
    from fieldprop.inputs.job import ModelSpec, ScfSpec
    from fieldprop.inputs.molecule import MoleculeSpec

    method = {"rhf": "hf", "uhf": "hf", "rks": "dft", "uks": "dft", "mp2": "mp2"}[kind]
    model = ModelSpec(method, "6-31g", "unrestricted" if kind.startswith("u") else "restricted",
                      "pbe" if method == "dft" else None)
    scf_spec = ScfSpec(1e-13, 1e-10, 200, 3 if method == "dft" else None)
    molecule = MoleculeSpec(_SYMBOLS, (8, 1, 1), tuple(map(tuple, _COORDS)), charge, spin + 1,
                            tuple(_ORIGIN))
    gradient = StructureEvaluator(molecule, model, scf_spec, _FIELD)(_COORDS).gradient
    step = 1e-4
    numeric = np.full_like(_COORDS, np.nan)
    # Every coordinate for RHF; one per atom, each along another axis, for the
    # rest (the same code path; DFT energies cost more).
    chosen = ([(a, x) for a in range(3) for x in range(3)] if kind == "rhf"
              else [(0, 0), (1, 1), (2, 2)])
    for a, x in chosen:
        if True:
            plus, minus = _COORDS.copy(), _COORDS.copy()
            plus[a, x] += step
            minus[a, x] -= step
            numeric[a, x] = (_energy(_SYMBOLS, plus, kind, _FIELD, _ORIGIN, charge=charge,
                                     spin=spin)
                             - _energy(_SYMBOLS, minus, kind, _FIELD, _ORIGIN, charge=charge,
                                       spin=spin)) / (2 * step)
    # Central differences err by ~step^2/6 E''' ~ 1e-9 Eh/bohr, the SCF by less;
    # PySCF's MP2 gradient solves its own CPHF (Z-vector) equations to its
    # tolerance (measured here: 7e-8 Eh/bohr). A missing field term would be
    # ~|F| Z ~ 3e-2 (nuclei) or ~|F| ~ 1e-3 (basis functions).
    compared = ~np.isnan(numeric)
    difference = np.abs(gradient - numeric)[compared]
    assert difference.max() < (2e-7 if kind == "mp2" else 2e-8), difference


def _run(tmp_path, name, text, *extra):
    path = tmp_path / f"{name}.toml"
    path.write_text(textwrap.dedent(text))
    code = main(["run", str(path), "--quiet", "--workers", "2", *extra])
    doc = json.loads((tmp_path / f"{name}.result.json").read_text())
    return code, doc


def _tensor(doc, key, name):
    t = doc[key][name]
    return (np.array(t["value"], dtype=float), np.array(t["error"], dtype=float))


def _scf_dipole(symbols, coords, basis="6-31g", spin=0):
    from pyscf import scf

    mf = (scf.UHF if spin else scf.RHF)(_mol(symbols, coords, basis, spin=spin))
    mf.conv_tol, mf.conv_tol_grad = 1e-13, 1e-10
    mf.kernel()
    return mf.dip_moment(unit="au", verbose=0)


def _analytic_hessian(symbols, coords, basis="6-31g", spin=0):
    from pyscf import scf

    mf = (scf.UHF if spin else scf.RHF)(_mol(symbols, coords, basis, spin=spin))
    mf.conv_tol, mf.conv_tol_grad = 1e-13, 1e-10
    mf.kernel()
    n = len(symbols)
    return mf.Hessian().kernel().transpose(0, 2, 1, 3).reshape(3 * n, 3 * n)


def _dipole_derivatives(symbols, coords, step, spin=0):
    """dmu/dR (3, 3N) by central differences of PySCF's analytic dipoles."""
    out = np.zeros((3, coords.size))
    for i in range(coords.size):
        d = np.zeros(coords.size)
        d[i] = step
        d = d.reshape(coords.shape)
        out[:, i] = (_scf_dipole(symbols, coords + d, spin=spin)
                     - _scf_dipole(symbols, coords - d, spin=spin)) / (2 * step)
    return out


HYDROGEN_FLUORIDE = """
    [molecule]
    geometry = \"\"\"
    F 0 0 0
    H 0 0 0.92
    \"\"\"
    [model]
    method = "hf"
    basis = "6-31g"
    [geometry]
    optimize = true
    [response]
    properties = ["alpha"]
    nuclear_relaxation = true
    """


def test_a_diatomic_relaxes_as_dmu_dr_squared_over_k(tmp_path):
    code, doc = _run(tmp_path, "hf", HYDROGEN_FLUORIDE)
    assert code == 0
    coords = np.array(doc["nuclear_relaxation"]["minimum"]["coords_bohr"])
    symbols = ("F", "H")
    # The bond along z: move H along it. k = d2E/dR2, dmu_z/dR.
    k = _analytic_hessian(symbols, coords)[5, 5]
    slopes = []
    for step in (1e-3, 2e-3):
        d = np.zeros_like(coords)
        d[1, 2] = step
        slopes.append((_scf_dipole(symbols, coords + d)[2]
                       - _scf_dipole(symbols, coords - d)[2]) / (2 * step))
    reference = slopes[0] ** 2 / k
    ref_error = abs(slopes[0] ** 2 - slopes[1] ** 2) / k  # the difference's own error
    value, error = _tensor(doc, "tensors_nuclear_relaxation", "alpha")
    assert abs(value[2, 2] - reference) <= error[2, 2] + ref_error + 1e-7 * reference, (
        value[2, 2], error[2, 2], reference)
    assert reference > 0.05  # a real contribution (HF/6-31G: ~0.1 au), not a vanishing one
    for i in (0, 1):  # no bending, no turning: nothing across the bond
        assert abs(value[i, i]) <= error[i, i] + 1e-9
    # The total is electronic plus nuclear relaxation.
    total, _ = _tensor(doc, "tensors_total", "alpha")
    electronic, _ = _tensor(doc, "tensors", "alpha")
    assert np.allclose(total, electronic + value, rtol=0, atol=1e-12)
    assert doc["invariants_total"]["alpha_iso"]["value"] > doc["invariants"]["alpha_iso"]["value"]


WATER = """
    [molecule]
    geometry = \"\"\"
    {geometry}
    \"\"\"
    [model]
    method = "hf"
    basis = "6-31g"
    [geometry]
    optimize = true
    [response]
    properties = ["dipole", "alpha", "beta"]
    nuclear_relaxation = true
    """


def _normal_mode_alpha(symbols, coords, masses, spin=0):
    """sum_a (dmu/dQ_a)^2 / omega_a^2: the harmonic analysis written here."""
    n = len(symbols)
    hessian = _analytic_hessian(symbols, coords, spin=spin)
    root = np.repeat(np.sqrt(masses), 3)
    weighted = hessian / np.outer(root, root)
    # Project the translations and rotations out (mass-weighted, about the
    # centre of mass), then diagonalise.
    centred = coords - masses @ coords / masses.sum()
    external = []
    for k in range(3):
        t = np.zeros((n, 3))
        t[:, k] = np.sqrt(masses)
        external.append(t.ravel())
        axis = np.eye(3)[k]
        external.append((np.cross(axis, centred) * np.sqrt(masses)[:, None]).ravel())
    q, _ = np.linalg.qr(np.array(external).T)
    projector = np.eye(3 * n) - q @ q.T
    w, modes = np.linalg.eigh(projector @ weighted @ projector)
    keep = w > 1e-6  # the 3N - 6 vibrations (rigid motions sit at ~0)
    assert keep.sum() == 3 * n - 6
    derivatives = {}
    for step in (1e-3, 2e-3):
        derivatives[step] = _dipole_derivatives(symbols, coords, step, spin)
    out = []
    for d in derivatives.values():
        dq = d @ (modes[:, keep] / root[:, None])  # dmu/dQ_a, Q mass-weighted
        out.append(dq @ np.diag(1.0 / w[keep]) @ dq.T)
    return out[0], np.abs(out[0] - out[1])


def test_a_polyatomic_matches_the_sum_over_normal_modes(tmp_path):
    from tests.physics.support import WATER_ANGSTROM, geometry_text, rotation

    geometry = geometry_text("OHH", WATER_ANGSTROM @ rotation().T)  # off every axis
    code, doc = _run(tmp_path, "water", WATER.format(geometry=geometry.replace("\n", "\n    ")))
    assert code == 0
    relaxation = doc["nuclear_relaxation"]
    coords = np.array(relaxation["minimum"]["coords_bohr"])
    # Most abundant isotopes, 16O and 1H (atomic mass evaluation; a fact of the
    # trade): the Eckart frame of a polar molecule depends on them. PySCF's table
    # rounds them to six decimals, and the frame uses those.
    assert np.allclose(relaxation["minimum"]["masses_u"],
                       [15.99491462, 1.00782503, 1.00782503], rtol=1e-7)
    masses = np.array(relaxation["minimum"]["masses_u"])
    reference, ref_error = _normal_mode_alpha(("O", "H", "H"), coords, masses)
    value, error = _tensor(doc, "tensors_nuclear_relaxation", "alpha")
    assert np.all(np.abs(value - reference) <= error + ref_error + 1e-7 * np.abs(reference).max()), (
        value, error, reference)
    assert np.abs(reference).max() > 0.05
    # The nuclei move in the field: beta^nr of water is not small (HF/6-31G).
    beta, beta_error = _tensor(doc, "tensors_nuclear_relaxation", "beta")
    assert np.abs(beta).max() > 1.0 and np.all(beta_error < 1e-2 * np.abs(beta).max())
    # Eckart: no overall translation or rotation of any relaxed structure.
    centred = coords - masses @ coords / masses.sum()
    assert relaxation["relaxed"]
    for point in relaxation["relaxed"]:
        moved = np.array(point["coords_bohr"])
        assert np.abs(moved - coords).max() > 1e-6  # the nuclei did move
        shift = masses @ (moved - coords)
        turn = (masses[:, None] * np.cross(centred, moved)).sum(axis=0)
        assert np.abs(shift).max() < 1e-10 and np.abs(turn).max() < 1e-10, (shift, turn)
    # The dipole is a zero-field quantity: relaxation leaves it.
    mu, mu_error = _tensor(doc, "tensors_nuclear_relaxation", "dipole")
    assert np.all(np.abs(mu) <= mu_error + 1e-12)


CARBON_DIOXIDE = """
    [molecule]
    geometry = \"\"\"
    C 0 0 0
    O 0 0 1.16
    O 0 0 -1.16
    \"\"\"
    [model]
    method = "hf"
    basis = "sto-3g"
    [geometry]
    optimize = true
    [response]
    properties = ["alpha", "beta"]
    nuclear_relaxation = true
    symmetry = false
    """


def test_beta_nr_vanishes_for_a_centrosymmetric_molecule(tmp_path):
    code, doc = _run(tmp_path, "co2", CARBON_DIOXIDE)
    assert code == 0
    value, error = _tensor(doc, "tensors_nuclear_relaxation", "beta")
    assert np.all(np.abs(value) <= error + 1e-9), (value, error)
    # ... while the relaxation is there: the bend and the asymmetric stretch
    # are infrared-active, alpha^nr is not zero.
    alpha, alpha_error = _tensor(doc, "tensors_nuclear_relaxation", "alpha")
    assert alpha[0, 0] > 10 * alpha_error[0, 0] and alpha[2, 2] > 10 * alpha_error[2, 2]


NH2 = """
    [molecule]
    geometry = \"\"\"
    N 0 0 0
    H 0 0.80 0.62
    H 0 -0.80 0.62
    \"\"\"
    multiplicity = 2
    [model]
    method = "hf"
    basis = "6-31g"
    [geometry]
    optimize = true
    [response]
    properties = ["alpha"]
    nuclear_relaxation = true
    """


@pytest.mark.slow
def test_an_open_shell_matches_the_sum_over_normal_modes(tmp_path):
    """The NH2 radical at UHF (dipole route, open-shell SCF targets): alpha^nr
    against the normal-mode sum from PySCF's UHF Hessian and dipoles."""
    code, doc = _run(tmp_path, "nh2", NH2)
    assert code == 0
    relaxation = doc["nuclear_relaxation"]
    coords = np.array(relaxation["minimum"]["coords_bohr"])
    masses = np.array(relaxation["minimum"]["masses_u"])
    reference, ref_error = _normal_mode_alpha(("N", "H", "H"), coords, masses, spin=1)
    value, error = _tensor(doc, "tensors_nuclear_relaxation", "alpha")
    assert np.all(np.abs(value - reference) <= error + ref_error + 1e-7 * np.abs(reference).max()), (
        value, error, reference)
    assert np.abs(reference).max() > 0.01
