"""A molecule in a polarizable continuum ([model] solvent).

Checks against quantities that share no code with fieldprop's:

- water at HF/6-31G in water (IEF-PCM) and at LDA in acetonitrile (C-PCM):
  alpha against central differences (Richardson-combined, written here) of
  PySCF's own PCM energies with the field in the core Hamiltonian;
- a continuum of epsilon = 1 is the gas phase;
- a push-pull molecule (3-aminopropenal, our sketch) in a polar continuum: the
  reaction field pulls charge along the donor-acceptor axis, so its dipole,
  alpha and beta rise from vacuum to chloroform to water; beta by tens of
  per cent or more (common practice: solvent changes a push-pull beta by tens
  of per cent); at HF/STO-3G beta_vector_norm about doubles in water;
- a rerun reuses every point; another solvent reuses none.
"""

import json
import textwrap
from pathlib import Path

import numpy as np
import pytest

from fieldprop.cli import main

pytest.importorskip("pyscf")

WATER = """\
O 0 0 0.117
H 0 0.757 -0.469
H 0 -0.757 -0.469"""


def _job(folder, name, model: str, geometry: str = WATER, xyz: str | None = None,
         properties='["dipole", "alpha"]') -> str:
    where = f'xyz = "{xyz}"' if xyz else f'geometry = """\n{geometry}\n"""'
    path = folder / f"{name}.toml"
    path.write_text(f"[molecule]\n{where}\n[model]\n{textwrap.dedent(model)}\n"
                    f"[response]\nproperties = {properties}\n")
    return str(path)


def _run(job, folder, *extra) -> dict:
    out = Path(folder) / (Path(job).stem + ".json")
    assert main(["run", job, "--workers", "2", "--quiet", "--json", str(out), *extra]) == 0
    return json.loads(out.read_text())


def _pcm_alpha(xc, method, eps, origin):
    """alpha from PySCF's PCM energies in fields (+F.r on the electrons, -F.sum
    Z R on the nuclei), central differences at h and 2h combined."""
    from pyscf import dft, gto, scf

    mol = gto.M(atom=WATER.replace("\n", "; "), basis="6-31g", verbose=0)
    with mol.with_common_orig(origin):
        r = mol.intor_symmetric("int1e_r", comp=3)

    def energy(f):
        mf = scf.RHF(mol) if xc is None else dft.RKS(mol)
        if xc is not None:
            mf.xc, mf.grids.level = xc, 5
        mf = mf.PCM()
        mf.with_solvent.method, mf.with_solvent.eps = method, eps
        h = mf.get_hcore() + np.einsum("x,xij->ij", f, r)
        e_nuc = mol.energy_nuc() - f @ (mol.atom_charges() @ (mol.atom_coords() - origin))
        mf.get_hcore = lambda *a: h
        mf.energy_nuc = lambda *a: e_nuc
        mf.conv_tol, mf.conv_tol_grad = 1e-12, 1e-8
        return mf.kernel()

    e0, step = energy(np.zeros(3)), 2e-3
    out = []
    for k in range(3):
        f = np.zeros(3)
        f[k] = step
        d1 = -(energy(f) - 2 * e0 + energy(-f)) / step ** 2
        d2 = -(energy(2 * f) - 2 * e0 + energy(-2 * f)) / (4 * step ** 2)
        out.append((4 * d1 - d2) / 3)
    return np.array(out)


@pytest.mark.parametrize("xc, solvent, model, method, eps", [
    (None, "water", "iefpcm", "IEF-PCM", 78.355),
    ("lda,vwn", "acetonitrile", "cpcm", "C-PCM", 35.688)], ids=["hf-iefpcm", "lda-cpcm"])
def test_alpha_against_pyscf_pcm_energies_in_fields(tmp_path, xc, solvent, model, method, eps):
    lines = ('method = "hf"' if xc is None else f'method = "dft"\nfunctional = "{xc}"') + \
        f'\nbasis = "6-31g"\nsolvent = "{solvent}"\nsolvent_model = "{model}"'
    job = _job(tmp_path, "water", lines + ("\n[scf]\ngrid_level = 5" if xc else ""))
    doc = _run(job, tmp_path)
    assert doc["solvent"]["epsilon"] == pytest.approx(eps)
    assert "reaction field" in doc["caution"]
    ours = np.diag(np.array(doc["tensors"]["alpha"]["value"]))
    bars = np.diag(np.array(doc["tensors"]["alpha"]["error"]))
    reference = _pcm_alpha(xc, method, eps, np.array(doc["origin_bohr"]))
    # The reference's own error: h^4 terms and energy noise / h^2, ~1e-6 au.
    assert np.all(np.abs(ours - reference) <= bars + 2e-6), (ours, reference)


def test_epsilon_one_is_the_gas_phase(tmp_path):
    gas = _run(_job(tmp_path, "gas", 'method = "hf"\nbasis = "6-31g"'), tmp_path, "--no-store")
    one = _run(_job(tmp_path, "one", 'method = "hf"\nbasis = "6-31g"\n'
                    'solvent = { epsilon = 1.0 }'), tmp_path, "--no-store")
    for name in ("dipole", "alpha"):
        a, b = (np.array(d["tensors"][name]["value"]) for d in (gas, one))
        bars = np.array(gas["tensors"][name]["error"]) + np.array(one["tensors"][name]["error"])
        assert np.all(np.abs(a - b) <= bars + 1e-9)


def test_a_push_pull_beta_rises_with_the_solvent_polarity(tmp_path):
    xyz = str(Path(__file__).resolve().parents[2] / "configs" / "molecules" /
              "aminopropenal.xyz")
    props = '["dipole", "alpha", "beta"]'
    values = {}
    for solvent in (None, "chloroform", "water"):
        lines = 'method = "hf"\nbasis = "sto-3g"' + (f'\nsolvent = "{solvent}"' if solvent
                                                     else "")
        doc = _run(_job(tmp_path, solvent or "gas", lines, xyz=xyz, properties=props),
                   tmp_path)
        values[solvent] = {k: doc["invariants"][k]["value"]
                           for k in ("dipole_norm", "alpha_iso", "beta_vector_norm")}
    for key in ("dipole_norm", "alpha_iso", "beta_vector_norm"):
        assert values[None][key] < values["chloroform"][key] < values["water"][key]
    assert values["water"]["beta_vector_norm"] > 1.3 * values[None]["beta_vector_norm"]


def test_a_rerun_reuses_the_solvent_points_and_another_solvent_none(tmp_path, capsys):
    def counts(job):
        capsys.readouterr()
        assert main(["run", job, "--json", str(tmp_path / "r.json")]) == 0
        line = next(t for t in capsys.readouterr().err.splitlines()
                    if "field points:" in t and "computed" in t)
        computed = int(line.split("field points:")[1].split("computed")[0])
        reused = int(line.split("computed, ")[1].split()[0])
        return computed, reused

    water = _job(tmp_path, "water", 'method = "hf"\nbasis = "sto-3g"\nsolvent = "water"')
    first = counts(water)
    assert first[0] > 0 and first[1] == 0
    assert counts(water) == (0, first[0])
    other = _job(tmp_path, "water", 'method = "hf"\nbasis = "sto-3g"\nsolvent = "methanol"')
    assert counts(other) == first


def test_the_kept_integrals_and_factorisation_give_pyscf_s_numbers():
    from pyscf import gto, scf

    from fieldprop.backend.solvent import cache

    mol = gto.M(atom=WATER.replace("\n", "; "), basis="6-31g", verbose=0)
    plain, kept = (scf.RHF(mol).PCM().with_solvent for _ in range(2))
    cache(kept)
    rng = np.random.default_rng(7)
    dm = rng.normal(size=(mol.nao, mol.nao))
    dm = dm + dm.T
    e_plain, v_plain = plain._get_vind(dm)
    e_kept, v_kept = kept._get_vind(dm)
    assert abs(e_plain - e_kept) <= 1e-10 * abs(e_plain)
    assert np.abs(v_plain - v_kept).max() <= 1e-10 * np.abs(v_plain).max()
    x = rng.normal(size=(2, mol.nao, mol.nao))
    assert np.allclose(plain._B_dot_x(x), kept._B_dot_x(x), rtol=0, atol=1e-10)


def test_excited_states_in_the_continuum_are_pyscf_s():
    # PySCF's TD copies the continuum with its optical dielectric constant: the
    # kept factorisation must be the copy's, not the ground state's.
    from pyscf import gto, scf

    from fieldprop.backend.solvent import cache

    mol = gto.M(atom=WATER.replace("\n", "; "), basis="sto-3g", verbose=0)
    energies = []
    for kept in (False, True):
        mf = scf.RHF(mol).PCM()
        mf.with_solvent.eps = 78.355
        if kept:
            cache(mf.with_solvent)
        mf.kernel()
        td = mf.TDHF()
        td.nstates, td.verbose = 3, 0
        td.kernel()
        energies.append(np.asarray(td.e))
    assert np.allclose(energies[0], energies[1], rtol=0, atol=1e-10)
