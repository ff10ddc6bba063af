"""Which path the backend takes for which kind of SCF object is decided by
asking what the object is (restricted open shell or not), never by catching
an exception: a restricted open shell takes its own path, and an error inside
the path of another reference surfaces instead of being taken for one.

The numbers of each path are checked against PySCF elsewhere
(test_nuclear_relaxation, test_restricted_open_shell, test_scf_references);
here: the dipole error of a closed shell is the norm of the diagonal step, of
an open shell on the dipole route the norm of the Newton step, of a restricted
open shell the orbital gradient itself; a Hessian of a restricted open shell
is the central differences of its gradients, density-fitted or not.
"""

import numpy as np
import pytest

pytest.importorskip("pyscf")


def _oh(cls, density_fit=False, **kwargs):
    from pyscf import gto

    mol = gto.M(atom="O 0 0 0; H 0 0 1.83", unit="Bohr", basis="sto-3g", spin=1, verbose=0)
    mf = cls(mol)
    for key, value in kwargs.items():
        setattr(mf, key, value)
    if density_fit:
        mf = mf.density_fit()
    mf.conv_tol = 1e-10
    mf.kernel()
    assert mf.converged
    return mf


def _dipole_integrals(mf):
    with mf.mol.with_common_orig((0.0, 0.0, 0.0)):
        return mf.mol.intor_symmetric("int1e_r", comp=3)


def test_each_reference_gets_its_own_dipole_error_estimate():
    from pyscf import gto, scf

    from fieldprop.backend.response import (_dipole_error, diagonal_dipole_step,
                                            newton_dipole_step)

    water = gto.M(atom="O 0 0 0.22; H 0 1.43 -0.89; H 0 -1.43 -0.89", unit="Bohr",
                  basis="sto-3g", verbose=0)
    closed = scf.RHF(water)
    closed.conv_tol_grad = 1e-4  # a remaining gradient for the estimates to see
    closed.kernel()
    r = _dipole_integrals(closed)
    fock = closed.get_fock()
    expected = np.linalg.norm(diagonal_dipole_step(closed, r, fock))
    assert expected > 0.0
    # Closed shells: the diagonal estimate on either route.
    assert _dipole_error(closed, r, fock, True) == expected
    open_shell = _oh(scf.UHF, conv_tol_grad=1e-4)
    r, fock = _dipole_integrals(open_shell), open_shell.get_fock()
    assert _dipole_error(open_shell, r, fock, True) == pytest.approx(
        np.linalg.norm(newton_dipole_step(open_shell, r, fock)), rel=1e-6)
    assert _dipole_error(open_shell, r, fock, False) == np.linalg.norm(
        diagonal_dipole_step(open_shell, r, fock))
    # Restricted open shells have their own orbital Hessian: the full-Hessian
    # estimate on the dipole route too.
    restricted_open = _oh(scf.ROHF, conv_tol_grad=1e-4)
    r, fock = _dipole_integrals(restricted_open), restricted_open.get_fock()
    assert _dipole_error(restricted_open, r, fock, True) == pytest.approx(
        np.linalg.norm(newton_dipole_step(restricted_open, r, fock)), rel=1e-6)
    assert _dipole_error(restricted_open, r, fock, False) == np.linalg.norm(
        diagonal_dipole_step(restricted_open, r, fock))


def test_an_error_inside_a_dipole_error_estimate_is_not_taken_for_a_restricted_open_shell(
        monkeypatch):
    from pyscf import gto, scf

    from fieldprop.backend import response as backend_response

    mol = gto.M(atom="H 0 0 0; H 0 0 1.4", unit="Bohr", basis="sto-3g", verbose=0)
    mf = scf.RHF(mol)
    mf.kernel()

    def broken(*args, **kwargs):
        raise TypeError("a defect inside the estimate")

    monkeypatch.setattr(backend_response, "diagonal_dipole_step", broken)
    with pytest.raises(TypeError, match="a defect inside"):
        backend_response._dipole_error(mf, _dipole_integrals(mf), mf.get_fock(), False)


class _QuadraticSurface:
    """An evaluator of a quadratic energy surface 1/2 x.H.x: central
    differences of its gradient are H exactly (to rounding)."""

    def __init__(self, hessian):
        from fieldprop.inputs.job import ModelSpec

        self.hessian = hessian
        self.model = ModelSpec("hf", "sto-3g", "restricted")

    def __call__(self, coords):
        from fieldprop.numerics.relaxation import Evaluation

        x = np.asarray(coords).ravel()
        return Evaluation(0.5 * x @ self.hessian @ x, (self.hessian @ x).reshape(-1, 3),
                          np.zeros(3))


@pytest.mark.parametrize("density_fit", [False, True])
def test_a_restricted_open_shell_hessian_is_central_differences_of_gradients(density_fit):
    from pyscf import scf

    from fieldprop.backend.gradients import _hessian

    mf = _oh(scf.ROHF, density_fit)
    rng = np.random.default_rng(7)
    a = rng.normal(size=(6, 6))
    surface = _QuadraticSurface(a + a.T)
    value, source = _hessian(surface, mf, mf.mol.atom_coords())
    assert source == "central differences of analytic gradients"
    # A quadratic's central difference is exact; rounding: ~1e-16 * |H x| / 1e-3 bohr.
    assert np.allclose(value, a + a.T, rtol=0.0, atol=1e-10)


@pytest.mark.parametrize("kind", ["RHF", "UHF", "ROHF", "RKS b3lyp", "UKS b3lyp",
                                  "ROKS b3lyp", "ROHF df",
                                  # VV10's grid: ~13 s each
                                  pytest.param("RKS wb97m-v", marks=pytest.mark.slow),
                                  pytest.param("UKS wb97m-v", marks=pytest.mark.slow)])
def test_the_analytic_hessian_is_asked_for_exactly_where_pyscf_computes_one(kind):
    from pyscf import dft, scf

    from fieldprop.backend.gradients import _has_nuclear_hessian

    name, _, extra = kind.partition(" ")
    cls = getattr(scf, name, None) or getattr(dft, name)
    settings = {} if extra in ("", "df") else {"xc": extra}
    mf = _oh(cls, density_fit=extra == "df", **settings)
    try:
        hessian = mf.Hessian()
        hessian.verbose = 0
        computed = np.all(np.isfinite(hessian.kernel()))
    except (NotImplementedError, ValueError):
        computed = False
    assert _has_nuclear_hessian(mf) == computed


def _near_icosahedron():
    """B12 at the vertices of an icosahedron (edge 4 bohr), each moved by
    ~1e-7 bohr: PySCF's point-group detection cannot classify it (it takes
    it for T or O, and its own consistency check stops it)."""
    from pyscf import gto

    phi = (1 + 5 ** 0.5) / 2
    vertices = 2.0 * np.array(
        [(0, a, b * phi) for a in (1, -1) for b in (1, -1)]
        + [(a, b * phi, 0) for a in (1, -1) for b in (1, -1)]
        + [(b * phi, 0, a) for a in (1, -1) for b in (1, -1)], dtype=float)
    vertices += np.random.default_rng(0).normal(size=vertices.shape) * 1e-7
    return gto.M(atom=[("B", tuple(v)) for v in vertices], unit="Bohr", basis="sto-3g",
                 verbose=0)


def test_a_molecule_symmetry_detection_cannot_classify_is_warned_about(caplog):
    from fieldprop.backend.states import symmetry_operations

    mol = _near_icosahedron()
    with caplog.at_level("WARNING", logger="fieldprop"):
        assert symmetry_operations(mol, None) == ()
    warned = [r for r in caplog.records if r.levelname == "WARNING"]
    assert len(warned) == 1
    text = warned[0].getMessage()
    assert "occupation-by-symmetry check is skipped" in text and text.startswith("B12")


def test_a_failure_of_symmetry_detection_that_is_not_pyscf_s_refusal_surfaces(monkeypatch):
    from pyscf import gto, symm

    from fieldprop.backend.states import symmetry_operations

    def broken(*args, **kwargs):
        raise TypeError("a defect in the call")

    monkeypatch.setattr(symm, "detect_symm", broken)
    mol = gto.M(atom="H 0 0 0; H 0 0 1.4", unit="Bohr", basis="sto-3g", verbose=0)
    with pytest.raises(TypeError, match="a defect in the call"):
        symmetry_operations(mol, None)
