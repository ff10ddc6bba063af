"""The zero-field linear response of a DFT reference: solved with the Newton
steps' coarse-grid kernel, then refined on the job's own grid, so that it is
the coupled-perturbed Kohn-Sham response of the job's model (checked against
PySCF's analytic polarizability and against a direct solve on that grid) and
the starts extrapolated from it carry no coarse-grid error."""

import textwrap

import numpy as np
import pytest

pytest.importorskip("pyscf")

from fieldprop.backend import context as backend_context  # noqa: E402
from fieldprop.backend import points as backend_points  # noqa: E402
from fieldprop.backend import response as backend_response  # noqa: E402
from fieldprop.backend.orbital_hessian import _orbital_hessian  # noqa: E402
from fieldprop.engine.prepare import prepare  # noqa: E402
from fieldprop.inputs.job import load_job  # noqa: E402
from support import WATER_ANGSTROM, geometry_text, nh2_geometry  # noqa: E402

WATER = geometry_text("OHH", WATER_ANGSTROM)


def _reference(tmp_path, geometry, functional, multiplicity=1, reference=""):
    path = tmp_path / "job.toml"
    path.write_text(textwrap.dedent(f"""
        [molecule]
        geometry = \"\"\"
{geometry}
        \"\"\"
        multiplicity = {multiplicity}
        [model]
        method = "dft"
        functional = "{functional}"
        basis = "6-31g"
        {reference}
        [response]
        properties = ["dipole", "alpha"]
        """))
    job = load_job(path)
    zero = next(t for t in prepare(job).tasks if t.is_zero_field)
    context = backend_context.ModelContext(zero.molecule, zero.model, zero.scf)
    backend_points.compute_reference(context, zero, check_geometry=False)
    mf = context.mean_field((0.0, 0.0, 0.0))
    mf.mo_coeff, mf.mo_occ = context.reference.mo_coeff, context.reference.mo_occ
    mf.mo_energy = backend_context._orbital_energies(mf)
    return context, mf


def _exact_rotations(context, mf):
    """The response solved directly with the Hessian on the job's grid."""
    exact = _orbital_hessian(mf, constraints=context.constraints)
    return np.array([exact.solve(-exact.vo(context.r[j]), 1e-11, "test") for j in range(3)])


@pytest.mark.parametrize("geometry, functional, multiplicity, reference", [
    (WATER, "b3lyp", 1, ""),
    (None, "pbe", 2, ""),
    (None, "pbe", 2, 'reference = "restricted"'),
], ids=["rks", "uks", "roks"])
def test_the_refined_response_is_the_job_grids_own(tmp_path, monkeypatch, geometry, functional,
                                                   multiplicity, reference):
    context, mf = _reference(tmp_path, geometry or nh2_geometry(), functional, multiplicity,
                             reference)
    assert context.coarse_kernel  # job grid 5, Newton steps' kernel on level 1
    exact = _exact_rotations(context, mf)
    refined = context.reference.field_rotations
    scale = np.linalg.norm(exact)
    assert np.linalg.norm(refined - exact) <= 1e-7 * scale
    # Without the refinement the coarse kernel's error is there, a thousand
    # times larger (so the check above can fail).
    monkeypatch.setattr(backend_response, "REFINEMENTS", 0)
    coarse = backend_response.zero_field_response(mf, context)[0]
    assert np.linalg.norm(coarse - exact) >= 1e-5 * scale


def test_the_refined_response_gives_pyscfs_analytic_polarizability(tmp_path):
    """alpha_ij = -4 r_i . x_j from the refined rotations against the
    coupled-perturbed Kohn-Sham polarizability of PySCF's properties extension
    (pyscf-properties on PyPI) on the same grid."""
    rks = pytest.importorskip("pyscf.prop.polarizability.rks")

    context, mf = _reference(tmp_path, WATER, "b3lyp")
    hessian = _orbital_hessian(mf)
    rmo = np.array([hessian.vo(context.r[j]) for j in range(3)])
    x = context.reference.field_rotations
    alpha = np.array([[hessian.density_trace(rmo[i], x[j]) for j in range(3)]
                      for i in range(3)])
    with mf.mol.with_common_orig(context.molecule.origin_bohr):
        reference = rks.Polarizability(mf).polarizability()
    assert np.allclose(alpha, reference, rtol=0, atol=1e-6 * np.abs(reference).max()), (
        alpha, reference)


@pytest.mark.parametrize("multiplicity", [1, 2])
def test_products_of_several_rows_at_once_are_the_single_products(tmp_path, multiplicity):
    geometry = WATER if multiplicity == 1 else nh2_geometry()
    context, mf = _reference(tmp_path, geometry, "pbe", multiplicity)
    hessian = _orbital_hessian(mf)
    xs = np.random.default_rng(7).normal(size=(3, hessian.diagonal.size))
    together = hessian.matmat(xs)
    one_by_one = np.array([hessian.matvec(x) for x in xs])
    assert np.allclose(together, one_by_one, rtol=0, atol=1e-10 * np.abs(one_by_one).max())
    assert hessian.products == 6


def test_a_reference_read_back_keeps_its_refined_rotations_and_refines_nothing(
        tmp_path, monkeypatch):
    """Another process reads the reference from the store: its rotations are
    the refined ones, and the subspace it solves again (the store keeps none)
    spends no pass on the job's grid."""
    from fieldprop.points.store import reference_from_bytes, reference_to_bytes

    context, mf = _reference(tmp_path, WATER, "b3lyp")
    stored = reference_from_bytes(reference_to_bytes(context.reference))
    assert np.array_equal(stored.field_rotations, context.reference.field_rotations)

    def refined(*args):
        raise AssertionError("refined again")

    monkeypatch.setattr(backend_response, "_refined", refined)
    other = backend_context.ModelContext(context.molecule, context.model, context.scf, stored)
    assert other.subspace is not None
