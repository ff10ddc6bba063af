"""Zero-point vibrational averaging ([response] zero_point).

Checks against quantities that share no code with fieldprop's averaging:

- a diatomic (hydrogen fluoride) at HF and at LDA: the correction of mu and
  alpha against the same first-order formula (D. M. Bishop, Rev. Mod. Phys.
  62, 343 (1990); D. M. Bishop and B. Kirtman, J. Chem. Phys. 95, 2646 (1991);
  cited from memory) evaluated here along the bond with PySCF alone: the
  minimum from PySCF's analytic gradient, k and the cubic constant from central
  differences of it, dP/dR and d2P/dR2 from central differences of PySCF's SCF
  dipole and of the CPHF/CPKS alpha written in analytic_reference.py;
- the same diatomic against the variational vibrational average written here:
  the ground state of the one-dimensional potential E(R) on a grid (finite
  differences), P(R) averaged over it. The first-order formula leaves out the
  quartic constant, the cubic one squared and P's higher derivatives: a few
  per cent of the correction;
- water: components forbidden by C2v stay zero (before they are set to zero),
  the correction of D2O (isotope_masses) is smaller by about the square root
  of the mass ratio of the moving nuclei (the amplitudes x / sqrt(m omega) and
  omega ~ m^-1/2: a correction ~ m^-1/2, common practice), and a rerun reuses
  every displaced geometry's points.
"""

import json
import textwrap

import numpy as np
import pytest
from scipy import constants

from fieldprop.cli import main

pytest.importorskip("pyscf")

AMU_TO_ME = constants.physical_constants["atomic mass constant"][0] / constants.m_e
MASSES_U = {"H": 1.00782503207, "F": 18.99840322}  # the most abundant isotopes (PySCF's table)


def _diatomic_job(folder, method_lines: str, properties='["dipole", "alpha"]') -> str:
    path = folder / "hf.toml"
    path.write_text(textwrap.dedent(f"""\
        [molecule]
        geometry = \"\"\"
        H 0 0 0
        F 0 0 0.917
        \"\"\"
        [model]
        {method_lines}
        basis = "6-31g"
        [response]
        properties = {properties}
        zero_point = true
        [geometry]
        optimise = true
        """))
    return str(path)


def _run(job: str, folder, *extra) -> dict:
    out = folder / "out.json"
    assert main(["run", job, "--workers", "2", "--quiet", "--json", str(out), *extra]) == 0
    return json.loads(out.read_text())


def _mean_field(r_bohr, xc):
    from pyscf import dft, gto, scf

    mol = gto.M(atom=[("H", (0.0, 0.0, 0.0)), ("F", (0.0, 0.0, r_bohr))], unit="Bohr",
                basis="6-31g", verbose=0)
    mf = scf.RHF(mol) if xc is None else dft.RKS(mol)
    if xc is not None:
        mf.xc = xc
        mf.grids.level = 5
    mf.conv_tol = 1e-13
    mf.conv_tol_grad = 1e-9
    mf.kernel()
    assert mf.converged
    return mf


def _bond_gradient(r, xc) -> float:
    mf = _mean_field(r, xc)
    return float(mf.nuc_grad_method().kernel()[1][2])


def _properties(r, xc):
    from analytic_reference import cphf_polarizability, scf_dipole

    mf = _mean_field(r, xc)
    a = cphf_polarizability(mf)
    return np.array([scf_dipole(mf)[2], a[2, 2], a[0, 0]])


def _reference(xc):
    """(r_e, omega, first-order correction of [mu_z, alpha_zz, alpha_xx], the
    variational one), PySCF alone along the bond."""
    from scipy.optimize import brentq

    r_e = brentq(lambda r: _bond_gradient(r, xc), 1.55, 1.95, xtol=1e-9)
    mu = MASSES_U["H"] * MASSES_U["F"] / (MASSES_U["H"] + MASSES_U["F"]) * AMU_TO_ME
    h = 0.01
    g = {k: _bond_gradient(r_e + k * h, xc) for k in (-1, 1)}
    k2 = (g[1] - g[-1]) / (2 * h)
    k3 = (g[1] + g[-1]) / (h * h)  # g(r_e) = 0
    omega = np.sqrt(k2 / mu)
    p = {k: _properties(r_e + k * h, xc) for k in (-2, -1, 0, 1, 2)}
    # Fourth-order central differences (common practice).
    p1 = (p[-2] - 8 * p[-1] + 8 * p[1] - p[2]) / (12 * h)
    p2 = (-p[-2] + 16 * p[-1] - 30 * p[0] + 16 * p[1] - p[2]) / (12 * h * h)
    first = p2 / (4 * mu * omega) - p1 * k3 / (4 * mu * mu * omega ** 3)
    # Variational: E(R) and P(R) fitted on +-0.6 bohr (5 rms amplitudes), the
    # ground state of -1/(2 mu) d2/dR2 + E(R) by finite differences.
    rs = r_e + np.linspace(-0.6, 0.6, 17)
    energies = np.array([_mean_field(r, xc).e_tot for r in rs])
    props = np.array([_properties(r, xc) for r in rs])
    grid = r_e + np.linspace(-0.6, 0.6, 1201)
    step = grid[1] - grid[0]
    v = np.polyval(np.polyfit(rs - r_e, energies, 10), grid - r_e)
    from scipy.linalg import eigh_tridiagonal

    _, psi = eigh_tridiagonal(v + 1.0 / (mu * step * step),
                              np.full(len(grid) - 1, -0.5 / (mu * step * step)),
                              select="i", select_range=(0, 0))
    weight = psi[:, 0] ** 2 / np.sum(psi[:, 0] ** 2)
    fitted = np.array([np.polyval(np.polyfit(rs - r_e, props[:, k], 10), grid - r_e)
                       for k in range(3)])
    variational = fitted @ weight - p[0]
    return r_e, omega, first, variational


@pytest.mark.parametrize("xc", [None, "lda,vwn"], ids=["hf", "lda"])
def test_a_diatomic_against_the_formula_and_the_variational_average(tmp_path, xc):
    method = 'method = "hf"' if xc is None else f'method = "dft"\nfunctional = "{xc}"'
    job = _diatomic_job(tmp_path, method) if xc is None else _write_with_scf(tmp_path, method)
    doc = _run(job, tmp_path)
    r_e, omega, first, variational = _reference(xc)
    coords = np.array([a["coords_bohr"] for a in doc["geometry_computed_bohr"]])
    assert abs(np.linalg.norm(coords[1] - coords[0]) - r_e) < 1e-5
    mode = doc["zero_point"]["modes"][0]
    # The reference k: a central difference at 0.01 bohr, truncation ~ 1e-4 relative.
    assert abs(mode["omega_au"] / omega - 1) < 5e-4
    zp = doc["tensors_zero_point"]
    ours = np.array([zp["dipole"]["value"][2], zp["alpha"]["value"][2][2],
                     zp["alpha"]["value"][0][0]])
    bars = np.array([zp["dipole"]["error"][2], zp["alpha"]["error"][2][2],
                     zp["alpha"]["error"][0][0]])
    # The same formula, evaluated independently: within 1 %.
    assert np.all(np.abs(ours - first) <= 0.01 * np.abs(first) + bars), (ours, first)
    # The exact vibrational average: the terms the first-order formula leaves
    # out are a few per cent; the sign and the size are right.
    assert np.all(np.sign(ours) == np.sign(variational))
    assert np.all(np.abs(ours - variational) <= 0.06 * np.abs(variational)), (ours, variational)
    # Totals are electronic plus correction.
    total = np.array(doc["tensors_total"]["alpha"]["value"])
    assert np.allclose(total, np.array(doc["tensors"]["alpha"]["value"])
                       + np.array(zp["alpha"]["value"]), atol=1e-12)


def _write_with_scf(folder, method: str) -> str:
    path = _diatomic_job(folder, method)
    with open(path, "a") as fh:
        fh.write("[scf]\ngrid_level = 5\n")
    return path


WATER = """\
[molecule]
geometry = \"\"\"
O 0 0 0.12
H 0 0.76 -0.47
H 0 -0.76 -0.47
\"\"\"
{isotopes}
[model]
method = "hf"
basis = "sto-3g"
[response]
properties = ["dipole", "alpha"]
zero_point = true
[geometry]
optimise = true
"""


def _water(folder, name: str, isotopes: str = "", symmetry: str = "true"):
    from fieldprop.engine.geometry import optimised, relaxed_reference
    from fieldprop.engine.prepare import prepare
    from fieldprop.engine.run import run_prepared
    from fieldprop.inputs.job import load_job
    from fieldprop.points.store import PointStore

    path = folder / f"{name}.toml"
    path.write_text(WATER.format(isotopes=isotopes).replace(
        "zero_point = true", f"zero_point = true\nsymmetry = {symmetry}"))
    with PointStore.open(folder / "points.sqlite") as store:
        job = relaxed_reference(optimised(load_job(path), store), store)
        return run_prepared(prepare(job), store, workers=2, progress=False)


def test_water_keeps_its_symmetry_and_heavy_water_corrects_less(tmp_path):
    water = _water(tmp_path, "water")
    part = water.zero_point
    # The B2 stretch's -s geometries are its +s ones mirrored: 2 of 12 not computed.
    assert part.geometries == 12 and part.images == 2
    raw = part.raw["alpha"]
    for i, j in ((0, 1), (0, 2), (1, 2)):  # forbidden by C2v (the molecule in the yz plane)
        assert abs(raw.value[i, j]) <= raw.error[i, j] + 1e-10 * np.abs(raw.value).max()
        assert part.correction["alpha"].value_au[i, j] == 0.0
    for k in (0, 1):
        assert abs(part.raw["dipole"].value[k]) <= part.raw["dipole"].error[k] + 1e-12
    plain = _water(tmp_path, "plain", symmetry="false").zero_point  # every geometry computed
    assert plain.images == 0
    for name in ("dipole", "alpha"):
        assert np.all(np.abs(plain.raw[name].value - part.raw[name].value)
                      <= plain.raw[name].error + part.raw[name].error + 1e-12)
    heavy = _water(tmp_path, "heavy", "isotope_masses = { 2 = 2.01410178, 3 = 2.01410178 }")
    assert heavy.zero_point.masses_u[1] == pytest.approx(2.01410178)
    light_iso = part.correction["alpha"].value_au.trace()
    heavy_iso = heavy.zero_point.correction["alpha"].value_au.trace()
    assert np.sign(light_iso) == np.sign(heavy_iso)
    # sqrt(1.008 / 2.014) = 0.71 for motions of the hydrogens alone.
    assert 0.62 < heavy_iso / light_iso < 0.80, heavy_iso / light_iso
    # One deuterium: the vibrations lose the mirror symmetry the electrons keep
    # (no geometry is taken as another's image), and the correction lies
    # between water's and heavy water's.
    mixed = _water(tmp_path, "mixed", "isotope_masses = { 2 = 2.01410178 }")
    assert mixed.zero_point.images == 0
    assert heavy_iso < mixed.zero_point.correction["alpha"].value_au.trace() < light_iso
    again = _water(tmp_path, "water")
    assert again.zero_point.computed == 0 and again.zero_point.reused == part.computed + \
        part.reused
    assert np.array_equal(again.zero_point.correction["alpha"].value_au,
                          part.correction["alpha"].value_au)


def _mp2(r, field=0.0, gradient=False):
    """MP2 (all electrons) of hydrogen fluoride along z with PySCF alone: the
    energy with +F z on the electrons and -F sum Z_A z_A on the nuclei (origin
    0), or the field-free bond gradient."""
    from pyscf import gto, mp, scf

    mol = gto.M(atom=[("H", (0.0, 0.0, 0.0)), ("F", (0.0, 0.0, r))], unit="Bohr",
                basis="6-31g", verbose=0)
    mf = scf.RHF(mol)
    if field:
        h = mf.get_hcore() + field * mol.intor_symmetric("int1e_r", comp=3)[2]
        e_nuc = mol.energy_nuc() - field * float(mol.atom_charges() @ mol.atom_coords()[:, 2])
        mf.get_hcore = lambda *args: h
        mf.energy_nuc = lambda *args: e_nuc
    mf.conv_tol, mf.conv_tol_grad = 1e-13, 1e-8
    mf.kernel()
    assert mf.converged
    pt = mp.MP2(mf).run(verbose=0)
    if gradient:
        return float(pt.nuc_grad_method().kernel()[1][2])
    return pt.e_tot


def test_mp2_against_the_formula_with_pyscf_alone(tmp_path):
    from scipy.optimize import brentq

    job = _diatomic_job(tmp_path, 'method = "mp2"\nfrozen_core = false')
    doc = _run(job, tmp_path)
    r_e = brentq(lambda r: _mp2(r, gradient=True), 1.55, 1.95, xtol=1e-9)
    mu = MASSES_U["H"] * MASSES_U["F"] / (MASSES_U["H"] + MASSES_U["F"]) * AMU_TO_ME
    h, f = 0.01, 2e-3
    g = {k: _mp2(r_e + k * h, gradient=True) for k in (-1, 1)}
    k2, k3 = (g[1] - g[-1]) / (2 * h), (g[1] + g[-1]) / (h * h)
    omega = np.sqrt(k2 / mu)

    def props(r):  # mu_z = -dE/dF, alpha_zz = -d2E/dF2 (central differences in F)
        e = {s: _mp2(r, s * f) for s in (-1, 0, 1)}
        return np.array([-(e[1] - e[-1]) / (2 * f), -(e[1] - 2 * e[0] + e[-1]) / (f * f)])

    p = {k: props(r_e + k * h) for k in (-2, -1, 0, 1, 2)}
    p1 = (p[-2] - 8 * p[-1] + 8 * p[1] - p[2]) / (12 * h)
    p2 = (-p[-2] + 16 * p[-1] - 30 * p[0] + 16 * p[1] - p[2]) / (12 * h * h)
    first = p2 / (4 * mu * omega) - p1 * k3 / (4 * mu * mu * omega ** 3)
    zp = doc["tensors_zero_point"]
    ours = np.array([zp["dipole"]["value"][2], zp["alpha"]["value"][2][2]])
    bars = np.array([zp["dipole"]["error"][2], zp["alpha"]["error"][2][2]])
    assert abs(doc["zero_point"]["modes"][0]["omega_au"] / omega - 1) < 5e-4
    assert np.all(np.abs(ours - first) <= 0.01 * np.abs(first) + bars), (ours, first, bars)


def test_a_job_array_gives_the_run_s_correction(tmp_path, capsys):
    # The recipe of a batch job array: the minimum's frame and gradients, then
    # rounds of plan --count and point --index, then collect.
    job = _diatomic_job(tmp_path, 'method = "hf"')
    text = (tmp_path / "hf.toml").read_text().replace('"6-31g"', '"sto-3g"')
    (tmp_path / "hf.toml").write_text(text)
    assert main(["point", job, "--zero-field", "--quiet"]) == 0
    for _ in range(4):
        capsys.readouterr()
        assert main(["plan", job, "--count"]) == 0
        count = int(capsys.readouterr().out.strip())
        if count == 0:
            break
        for i in range(count):
            assert main(["point", job, "--index", str(i), "--quiet"]) == 0
    assert count == 0
    collected = tmp_path / "collected.json"
    assert main(["collect", job, "--json", str(collected), "--quiet"]) == 0
    ran = _run(job, tmp_path, "--no-store")
    got = json.loads(collected.read_text())
    for name in ("dipole", "alpha"):
        a = np.array(got["tensors_zero_point"][name]["value"])
        b = np.array(ran["tensors_zero_point"][name]["value"])
        bars = np.array(ran["tensors_zero_point"][name]["error"])
        assert np.all(np.abs(a - b) <= 1e-3 * bars + 1e-12)
