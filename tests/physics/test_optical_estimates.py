"""Optical-frequency estimates ([response] optical_wavelengths_nm).

The excited state against PySCF's own TDHF/TDDFT run here on the same
molecule and the rule applied here; every estimate against the static
invariant times the two-state second-harmonic and electro-optic factors
written here (J. L. Oudar and D. S. Chemla, J. Chem. Phys. 66, 2664 (1977),
cited from memory); collect reads the stored excited states back and
computes none.
"""

import json
import textwrap

import pytest
from scipy import constants

from fieldprop.cli import main

pytest.importorskip("pyscf")

GEOMETRY = """\
C 0.000000 0.000000 0.000000
O 0.000000 0.000000 1.205000
H 0.000000 0.941376 -0.588252
H 0.000000 -0.941376 -0.588252"""  # formaldehyde, our geometry


def _job(folder, method: str, wavelengths: str = "[1064, 1907]") -> str:
    path = folder / "job.toml"
    path.write_text(textwrap.dedent(f"""\
        [molecule]
        geometry = \"\"\"
        {{}}
        \"\"\"
        [model]
        {method}
        basis = "sto-3g"
        [response]
        properties = ["dipole", "alpha", "beta"]
        optical_wavelengths_nm = {wavelengths}
        """).format(GEOMETRY))
    return str(path)


@pytest.mark.parametrize("xc", [None, "b3lyp"], ids=["tdhf", "tddft"])
def test_estimates_are_the_static_invariants_times_the_two_state_factors(tmp_path, xc):
    from pyscf import dft, gto, scf, tdscf

    method = 'method = "hf"' if xc is None else f'method = "dft"\nfunctional = "{xc}"'
    job = _job(tmp_path, method)
    out = tmp_path / "out.json"
    assert main(["run", job, "--workers", "2", "--quiet", "--json", str(out)]) == 0
    doc = json.loads(out.read_text())
    est = doc["optical_estimates"]
    # PySCF alone: the same molecule, its lowest 8 states, the rule.
    atoms = [(line.split()[0], tuple(float(v) for v in line.split()[1:]))
             for line in GEOMETRY.splitlines()]
    mol = gto.M(atom=atoms, basis="sto-3g", verbose=0)
    mf = scf.RHF(mol) if xc is None else dft.RKS(mol)
    if xc is not None:
        mf.xc = xc
    mf.conv_tol = 1e-11
    mf.kernel()
    td = tdscf.TDHF(mf) if xc is None else tdscf.TDDFT(mf)
    td.nstates = 8
    td.kernel()
    f = td.oscillator_strength(gauge="length")
    chosen = next(i for i, v in enumerate(f) if v >= 0.5 * max(f))
    assert est["state"] == chosen + 1
    # The job's DFT grid may differ from PySCF's default: 1e-4 Eh.
    assert est["excitation_energy_au"] == pytest.approx(td.e[chosen], abs=1e-4 if xc else 1e-6)
    assert est["oscillator_strength"] == pytest.approx(f[chosen], rel=1e-3)
    w_eg = est["excitation_energy_au"]
    for entry in est["entries"]:
        w = constants.h * constants.c / (entry["wavelength_nm"] * 1e-9) \
            / constants.physical_constants["Hartree energy"][0]
        factor = (w_eg ** 4 / ((w_eg ** 2 - w ** 2) * (w_eg ** 2 - 4 * w ** 2))
                  if entry["process"] == "second-harmonic"
                  else w_eg ** 2 * (3 * w_eg ** 2 - w ** 2) / (3 * (w_eg ** 2 - w ** 2) ** 2))
        assert not entry["resonant"] and entry["factor"] == pytest.approx(factor, rel=1e-10)
        assert factor > 1.0
        for name in ("beta_hrs", "beta_vector_norm", "beta_parallel"):
            static = doc["invariants"][name]
            assert entry["invariants"][name]["value"] == pytest.approx(static["value"] * factor,
                                                                       rel=1e-12)
            assert entry["invariants"][name]["error"] == pytest.approx(static["error"] * factor,
                                                                       rel=1e-12)
    # collect: the stored states, nothing computed.
    again = tmp_path / "again.json"
    assert main(["collect", job, "--quiet", "--json", str(again)]) == 0
    assert json.loads(again.read_text())["optical_estimates"]["entries"] == est["entries"]
    # A wavelength whose second harmonic sits on the excitation: flagged, no
    # number, a warning; its electro-optic estimate (at w alone) still formed.
    hartree = constants.physical_constants["Hartree energy"][0]
    resonant = 2 * constants.h * constants.c / (w_eg * hartree) * 1e9  # 2 hbar w = w_eg
    job = _job(tmp_path, method, f"[{resonant:.3f}]")
    assert main(["collect", job, "--quiet", "--json", str(again)]) == 0
    doc = json.loads(again.read_text())
    shg, eo = doc["optical_estimates"]["entries"]
    assert shg["process"] == "second-harmonic" and shg["resonant"] and shg["factor"] is None
    assert not shg["invariants"] and "resonant" in shg["reason"]
    assert not eo["resonant"] and eo["factor"] > 1.0
    assert any("resonant" in w for w in doc["warnings"])


def test_collect_without_the_excited_states_is_incomplete(tmp_path, capsys):
    plain = _job(tmp_path, 'method = "hf"', "[]")
    assert main(["run", plain, "--workers", "2", "--quiet", "--json",
                 str(tmp_path / "plain.json")]) == 0
    job = _job(tmp_path, 'method = "hf"')  # the same points, now with a wavelength
    capsys.readouterr()
    assert main(["collect", job, "--json", str(tmp_path / "c.json")]) == 3
    err = capsys.readouterr().err
    assert "optical_wavelengths_nm: the excited states" in err and "fieldprop run" in err
