"""Point-group symmetry in a run: fewer computed points, the same tensors as
the full stencil within error bars, components the group forbids exactly
zero, for molecules of four point groups placed on and off their axes.

Geometries are our own idealised shapes (angstrom); HF/6-31G keeps the runs
short. The no-symmetry run of the same job (``symmetry = false``) is the
reference: every planned point computed, nothing mapped."""

import math

import numpy as np
import pytest

pytest.importorskip("pyscf")

from support import geometry_text, rotation, run_job  # noqa: E402

from fieldprop.numerics.extrapolate import ComponentStatus  # noqa: E402


def _pyramid(bond, height):
    r = math.sqrt(bond ** 2 - height ** 2)
    return [(0, 0, 0)] + [(r * math.cos(2 * math.pi * k / 3), r * math.sin(2 * math.pi * k / 3),
                           -height) for k in range(3)]


MOLECULES = {
    # C2v: water in the yz plane, C2 along z.
    "water": ("OHH", [(0, 0, 0.1173), (0, 0.7572, -0.4692), (0, -0.7572, -0.4692)]),
    # C3v: ammonia, C3 along z, one N-H in the xz plane.
    "ammonia": ("NHHH", _pyramid(1.012, 0.38)),
    # D2h: ethylene in the yz plane, C=C along z (centrosymmetric: beta = 0).
    "ethylene": ("CCHHHH", [(0, 0, 0.667), (0, 0, -0.667), (0, 0.923, 1.232),
                            (0, -0.923, 1.232), (0, 0.923, -1.232), (0, -0.923, -1.232)]),
    # C-inf-v: hydrogen cyanide along z.
    "hcn": ("HCN", [(0, 0, -1.066), (0, 0, 0), (0, 0, 1.156)]),
}


def _job(name, placed, symmetry):
    symbols, coords = MOLECULES[name]
    x = np.array(coords, dtype=float)
    if placed == "off-axis":
        x = x @ rotation().T + np.array([0.31, -0.17, 0.52])
    return f"""
        [molecule]
        geometry = \"\"\"
{geometry_text(symbols, x)}
        \"\"\"
        [model]
        method = "hf"
        basis = "6-31g"
        [response]
        properties = ["dipole", "alpha", "beta"]
        field_au = 0.002
        levels = 3
        symmetry = {str(symmetry).lower()}
        """


@pytest.mark.parametrize("placed", ["aligned", "off-axis"])
@pytest.mark.parametrize("name", MOLECULES)
def test_symmetry_gives_the_full_stencils_tensors_with_fewer_points(tmp_path, name, placed):
    _, full = run_job(tmp_path, _job(name, placed, False), name="full.toml")
    _, sym = run_job(tmp_path, _job(name, placed, True), name="sym.toml")
    assert sym.symmetry is not None and full.symmetry is None
    computed = sym.counts.planned - sym.counts.images
    assert sym.counts.computed == computed < full.counts.computed
    for tensor in ("dipole", "alpha", "beta"):
        a, b = sym.tensors[tensor], full.tensors[tensor]
        assert a.stable.all() and b.stable.all(), tensor
        bar = np.hypot(a.error_au, b.error_au)
        # Within 3 combined error bars, or 1e-9 of the tensor's size (the
        # stencils of the two runs are the same; only the SCF noise differs).
        floor = 1e-9 * max(np.max(np.abs(b.value_au)), 1.0)
        assert np.all(np.abs(a.value_au - b.value_au) <= np.maximum(3 * bar, floor)), tensor
        # The result is invariant under every operation of the group (each
        # entry within 3 error bars of its image).
        if sym.symmetry.kind == "finite":
            for op in sym.symmetry.operations:
                turned = a.value_au
                for axis in range(turned.ndim):
                    turned = np.moveaxis(np.tensordot(op, turned, axes=([1], [axis])), 0, axis)
                assert np.all(np.abs(turned - a.value_au) <= np.maximum(6 * a.error_au, floor))
        # A component the group forbids is exactly zero, with its reason.
        for comp in a.components:
            if sym.symmetry.forced_zero(comp.plan.indices):
                assert comp.estimate.status is ComponentStatus.SYMMETRY_ZERO
                assert comp.estimate.value_au == 0.0 and comp.estimate.error_au == 0.0
                assert "point group" in comp.estimate.reason
                for entry in comp.entries:
                    assert a.value_au[entry] == 0.0 and a.error_au[entry] == 0.0
    if name == "ethylene":  # inversion: every beta entry exactly zero, wherever placed
        assert np.all(sym.tensors["beta"].value_au == 0.0)
        assert np.all(sym.tensors["dipole"].value_au == 0.0)
    if placed == "aligned" and name == "water":
        # C2v in its axes, the index symmetry assumed: without symmetry the three
        # axes and beta_xyz's diagonal line (25 points); with it beta_xyz is
        # forbidden (19 planned) and the -x and -y points of each level are
        # mirror images of the +x and +y ones (13 computed).
        assert (full.counts.computed, sym.counts.planned, computed) == (25, 19, 13)


def test_an_open_shell_keeps_every_point(tmp_path):
    """Images are exact only for a totally symmetric, non-degenerate state;
    fieldprop maps points of closed shells only (an open shell's state may
    belong to another irreducible representation)."""
    job = _job("water", "aligned", True).replace("[molecule]",
                                                   "[molecule]\n        charge = 1\n"
                                                   "        multiplicity = 2")
    _, result = run_job(tmp_path, job)
    assert result.symmetry is None and result.counts.images == 0


# Off the axes in the slow set (50 s): the default suite keeps the aligned case.
@pytest.mark.parametrize("placed", ["aligned", pytest.param("off-axis", marks=pytest.mark.slow)])
def test_dft_maps_points_only_by_operations_its_grid_keeps(tmp_path, placed):
    """DFT integrates on atom-centred Lebedev grids fixed in the input axes,
    invariant under signed permutations of those axes only: water in its axes
    keeps all four C2v operations (and the tensors of the full stencil);
    turned, none of its operations keeps the grid, and every point is
    computed (images through them would differ by the grid's error, ~1e-5 au
    in alpha, as measured before this rule)."""
    def job(symmetry):
        return _job("water", placed, symmetry).replace(
            'method = "hf"', 'method = "dft"\n        functional = "b3lyp"')

    _, full = run_job(tmp_path, job(False), name="full.toml")
    _, sym = run_job(tmp_path, job(True), name="sym.toml")
    if placed == "off-axis":
        assert sym.symmetry is None and sym.counts.computed == full.counts.computed
        return
    assert sym.symmetry.name == "C2v, 4 operations" and sym.plan.frame is None
    assert sym.counts.computed < full.counts.computed
    for tensor in ("dipole", "alpha", "beta"):
        a, b = sym.tensors[tensor], full.tensors[tensor]
        bar = np.hypot(a.error_au, b.error_au)
        assert np.all(np.abs(a.value_au - b.value_au) <= np.maximum(3 * bar, 1e-9)), tensor
