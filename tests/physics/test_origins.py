"""Origins of the dipole operator for an ion: the centre of mass.

For a molecule of charge q, mu(O') = mu(O) - q (O' - O) (the electrons'
and nuclei's moments shift by their total charge, common practice). The centre
of mass is computed here from the IUPAC abridged standard atomic weights
(O 15.999, H 1.008; common practice), not from fieldprop's table.
"""

import numpy as np
import pytest

pytest.importorskip("pyscf")

from support import bent_triatomic, geometry_text, rotation, run_job  # noqa: E402

#: The water cation, our geometry (O-H 0.99 angstrom, 109 degrees), tilted.
CATION = bent_triatomic(0.99, 109.0) @ rotation().T + np.array([0.4, -0.3, 0.2])
WEIGHTS = {"O": 15.999, "H": 1.008}


def _job(origin: str) -> str:
    return f"""
        [molecule]
        geometry = \"\"\"
{geometry_text("OHH", CATION)}
        \"\"\"
        charge = 1
        multiplicity = 2
        [model]
        method = "hf"
        basis = "sto-3g"
        [response]
        properties = ["dipole"]
        origin = "{origin}"
        """


def test_centre_of_mass_origin_shifts_an_ions_dipole_by_its_charge(tmp_path, capsys):
    from fieldprop.cli import main
    from fieldprop.numerics.units import ANGSTROM_TO_BOHR

    _, at_zero = run_job(tmp_path, _job("zero"), "zero.toml")
    _, at_com = run_job(tmp_path, _job("centre-of-mass"), "com.toml")
    masses = np.array([WEIGHTS[s] for s in "OHH"])
    com_bohr = masses @ (CATION * ANGSTROM_TO_BOHR) / masses.sum()
    assert np.allclose(at_com.molecule.origin_bohr, com_bohr, atol=1e-9)
    mu_zero = at_zero.tensors["dipole"].value_au
    mu_com = at_com.tensors["dipole"].value_au
    # mu(O') = mu(O) - q (O' - O), q = +1, O = 0: exact up to the SCF dipoles' noise.
    assert np.allclose(mu_com, mu_zero - 1.0 * com_bohr, atol=1e-8), (mu_com, mu_zero, com_bohr)
    # The tables say, beside an ion's dipole, that it depends on the origin, and which.
    assert main(["run", str(tmp_path / "com.toml"), "--quiet", "--no-store"]) == 0
    out = capsys.readouterr().out
    assert "the dipole of an ion depends on the origin" in out
    assert "about the centre-of-mass origin" in out
