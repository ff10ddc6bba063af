"""Shared set-up for physics tests: jobs written to a temporary folder, run in-process."""

import textwrap

import numpy as np
import pytest

pytest.importorskip("pyscf")

from fieldprop.engine.run import compute  # noqa: E402
from fieldprop.inputs.job import load_job  # noqa: E402

#: Water built by us (O-H 0.958 A, H-O-H 104.4 deg, roughly the experimental
#: equilibrium, a fact of the trade), in angstrom.
WATER_ANGSTROM = np.array([[0.0, 0.0, 0.1173], [0.0, 0.7572, -0.4692], [0.0, -0.7572, -0.4692]])


def bent_triatomic(bond_angstrom: float, angle_degrees: float) -> np.ndarray:
    """A-B2 in the yz plane, A at the origin (angstrom): our water and NH2 builder."""
    half = np.radians(angle_degrees) / 2.0
    y, z = bond_angstrom * np.sin(half), bond_angstrom * np.cos(half)
    return np.array([[0.0, 0.0, 0.0], [0.0, y, z], [0.0, -y, z]])


#: The NH2 radical (2B1, a non-degenerate ground state; OH's degenerate 2Pi is
#: avoided on purpose), our geometry: N-H 1.024 A, 103 deg.
NH2_ANGSTROM = bent_triatomic(1.024, 103.0)


def nh2_geometry() -> str:
    """NH2 rotated off the axes, as geometry lines in angstrom."""
    return geometry_text("NHH", NH2_ANGSTROM @ rotation().T)


def rotation(seed: int = 7) -> np.ndarray:
    """A fixed proper rotation that moves every symmetry axis off x, y, z."""
    from scipy.spatial.transform import Rotation

    return Rotation.from_euler("zyx", [37.0, 23.0, -61.0], degrees=True).as_matrix()


def geometry_text(symbols, coords) -> str:
    """``symbol x y z`` lines at full double precision (the text reads back to
    the same numbers), so that a geometry built symmetric stays symmetric to
    round-off (fieldprop uses a point group only then)."""
    return "\n".join(f"{s} {float(x)!r} {float(y)!r} {float(z)!r}"
                     for s, (x, y, z) in zip(symbols, coords))


def rotated_water() -> str:
    return geometry_text("OHH", WATER_ANGSTROM @ rotation().T + np.array([0.3, -0.2, 0.1]))


def run_job(tmp_path, text: str, name: str = "job.toml", workers: int = 1):
    path = tmp_path / name
    path.write_text(textwrap.dedent(text))
    job = load_job(path)
    return job, compute(job, workers=workers, progress=False)


def mean_field(job, conv_tol=1e-12, field=None, origin=(0.0, 0.0, 0.0),
               accept_gradient=None):
    """An independent PySCF SCF of the job's molecule and model (no fieldprop
    code); with ``field`` (au), +F.(r - origin) added to its core Hamiltonian.
    ``accept_gradient``: an SCF that stalls (PySCF's second-order solver stops
    near 1e-9 for some open shells) is accepted at an orbital gradient up to it."""
    from pyscf import dft, gto, scf

    m = job.molecule
    mol = gto.M(atom=[(a.symbol, a.coords_bohr) for a in m.atoms], unit="Bohr",
                basis=job.model.basis, charge=m.charge, spin=m.multiplicity - 1, verbose=0)
    unrestricted = job.model.reference == "unrestricted"
    if job.model.method == "dft":
        mf = (dft.UKS if unrestricted else dft.RKS)(mol)
        mf.xc = job.model.functional
        mf.grids.level = job.scf.grid_level
    else:
        mf = (scf.UHF if unrestricted else scf.RHF)(mol)
    if field is not None:
        with mol.with_common_orig(np.asarray(origin, dtype=float)):
            r = mol.intor_symmetric("int1e_r", comp=3)
        h = mf.get_hcore() + np.einsum("x,xij->ij", np.asarray(field, dtype=float), r)
        mf.get_hcore = lambda *args: h
    mf.conv_tol = conv_tol
    # A reference converged to g = 1e-11: its dipole and CPHF alpha err by ~g.
    mf.conv_tol_grad = 1e-11
    mf.max_cycle = 300
    mf.kernel()
    if not mf.converged:  # open shells: DIIS may stall near 1e-11; Newton finishes
        mf = mf.newton()
        mf.kernel(mf.make_rdm1())
    if accept_gradient is not None and not mf.converged:
        assert np.linalg.norm(mf.get_grad(mf.mo_coeff, mf.mo_occ)) <= accept_gradient
        return mf
    assert mf.converged
    return mf


def agree(ff_value, ff_error, reference, floor):
    """|ff - ref| within three error bars, or an absolute floor (style guide rule)."""
    return np.abs(np.asarray(ff_value) - reference) <= np.maximum(3.0 * np.asarray(ff_error),
                                                                  floor)
