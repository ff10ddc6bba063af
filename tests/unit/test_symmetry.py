"""Point-group symmetry of the nuclear framework (fieldprop.numerics.symmetry), pure
numerics: group orders of textbook molecules wherever they are placed, the
components the group forces to zero, images of field vectors, and the
symmetrised geometry.

Group orders and Schoenflies symbols are the textbook ones (common practice):
C2v 4, C3v 6, D2h 8, Td 24, D6h 24, Oh 48; C2, C2h, D2, D3d, D3h for the shapes
of test_point_group_symbols. The geometries are our own idealised shapes.
"""

import math

import numpy as np
import pytest

from fieldprop.numerics.symmetry import SYMMETRY_TOLERANCE_BOHR, detect, image_record, images


def _bent(bond, angle_deg):
    h = math.radians(angle_deg) / 2
    return [(0, 0, 0), (0, bond * math.sin(h), -bond * math.cos(h)),
            (0, -bond * math.sin(h), -bond * math.cos(h))]


def _pyramid(bond, height):
    r = math.sqrt(bond ** 2 - height ** 2)
    return [(0, 0, 0)] + [(r * math.cos(2 * math.pi * k / 3), r * math.sin(2 * math.pi * k / 3),
                           -height) for k in range(3)]


MOLECULES = {
    # name: (charges, coordinates in bohr, group order)
    "water (C2v)": ((8, 1, 1), _bent(1.81, 104.5), 4),
    "ammonia (C3v)": ((7, 1, 1, 1), _pyramid(1.91, 0.72), 6),
    "ethylene (D2h)": ((6, 6, 1, 1, 1, 1),
                       [(0, 0, 1.26), (0, 0, -1.26), (0, 1.75, 2.33), (0, -1.75, 2.33),
                        (0, 1.75, -2.33), (0, -1.75, -2.33)], 8),
    "methane (Td)": ((6, 1, 1, 1, 1),
                     [(0, 0, 0), (1.19, 1.19, 1.19), (-1.19, -1.19, 1.19), (-1.19, 1.19, -1.19),
                      (1.19, -1.19, -1.19)], 24),
    "benzene (D6h)": ((6,) * 6 + (1,) * 6,
                      [(2.64 * math.cos(k * math.pi / 3), 2.64 * math.sin(k * math.pi / 3), 0)
                       for k in range(6)]
                      + [(4.68 * math.cos(k * math.pi / 3), 4.68 * math.sin(k * math.pi / 3), 0)
                         for k in range(6)], 24),
    "SF6 (Oh)": ((16,) + (9,) * 6,
                 [(0, 0, 0), (2.95, 0, 0), (-2.95, 0, 0), (0, 2.95, 0), (0, -2.95, 0),
                  (0, 0, 2.95), (0, 0, -2.95)], 48),
}


def _turn(seed):
    """A random rotation and displacement (an arbitrary placement of the molecule)."""
    rng = np.random.default_rng(seed)
    q, r = np.linalg.qr(rng.normal(size=(3, 3)))
    q = q @ np.diag(np.sign(np.diag(r)))
    if np.linalg.det(q) < 0:
        q[:, 0] *= -1
    return q, rng.normal(size=3) * 3.0


def _is_group(ops):
    """Closed under products, each operation orthogonal."""
    for a in ops:
        assert np.allclose(a @ a.T, np.eye(3), atol=1e-10)
        for b in ops:
            assert any(np.allclose(a @ b, c, atol=1e-8) for c in ops)


@pytest.mark.parametrize("name", MOLECULES)
@pytest.mark.parametrize("placed", ["aligned", "off-axis"])
def test_group_orders_wherever_the_molecule_is_placed(name, placed):
    charges, coords, order = MOLECULES[name]
    x = np.array(coords, dtype=float)
    if placed == "off-axis":
        q, shift = _turn(hash(name) % 1000)
        x = x @ q.T + shift
    sym = detect(charges, x)
    assert sym is not None and sym.kind == "finite"
    assert len(sym.operations) == order
    assert np.allclose(sym.operations[0], np.eye(3))
    _is_group(sym.operations)
    # Every operation maps the framework onto itself, element onto element.
    z = np.array(charges)
    for op in sym.operations:
        image = (x - sym.centre) @ op.T + sym.centre
        for i in range(len(x)):
            d = np.linalg.norm(x - image[i], axis=1)
            assert d[z == z[i]].min() < 1e-8
    assert sym.moved_bohr < 1e-9
    assert sym.name == f"{name.split('(')[1][:-1]}, {order} operations"


def test_no_symmetry_is_none_and_a_near_miss_is_symmetrised():
    charges, coords, _ = MOLECULES["water (C2v)"]
    x = np.array(coords, dtype=float)
    # A hydrogen made fluorine: only the molecular plane is left (Cs).
    assert len(detect((8, 1, 9), x).operations) == 2
    assert detect((8, 1, 9, 6), np.vstack([x, [0.4, 0.3, 0.9]])) is None  # C1
    skew = x.copy()
    skew[1, 1] += 1e-3  # one bond longer by 1e-3 bohr: beyond the tolerance
    sym = detect(charges, skew)
    assert sym is None or len(sym.operations) == 2  # the molecular plane stays
    near = x.copy()
    near[1, 1] += 0.2 * SYMMETRY_TOLERANCE_BOHR
    sym = detect(charges, near)
    assert len(sym.operations) == 4
    assert 0 < sym.moved_bohr <= SYMMETRY_TOLERANCE_BOHR
    # The symmetrised geometry is exactly symmetric.
    assert len(detect(charges, sym.coords_bohr, tolerance=1e-12).operations) == 4


def test_forced_zeros_of_water_in_its_axes():
    """C2v with the C2 axis along z and the molecule in the yz plane: mu along z
    only; alpha diagonal; beta_zzz, beta_zxx, beta_zyy and their permutations
    only (textbook selection rules, common practice)."""
    charges, coords, _ = MOLECULES["water (C2v)"]
    sym = detect(charges, coords)
    assert [sym.forced_zero((i,)) for i in range(3)] == [True, True, False]
    for i in range(3):
        for j in range(3):
            assert sym.forced_zero((i, j)) == (i != j)
    allowed = set()
    for idx in np.ndindex(3, 3, 3):
        if not sym.forced_zero(idx):
            allowed.add(tuple(sorted(idx)))
    assert allowed == {(2, 2, 2), (0, 0, 2), (1, 1, 2)}


def test_forced_zeros_of_an_atom_a_linear_molecule_and_a_centrosymmetric_one():
    atom = detect((2,), [(0.3, -0.1, 0.2)])
    assert atom.kind == "atom"
    assert all(atom.forced_zero((i,)) for i in range(3))
    assert all(atom.forced_zero(idx) for idx in np.ndindex(3, 3, 3))
    assert not atom.forced_zero((0, 0, 1, 1)) and atom.forced_zero((0, 0, 0, 1))
    assert atom.forced_zero((0, 1)) and not atom.forced_zero((2, 2))
    # A linear molecule along z: mu_z, alpha_xx = alpha_yy and alpha_zz only.
    hcn = detect((1, 6, 7), [(0, 0, -2.0), (0, 0, 0), (0, 0, 2.2)])
    assert hcn.kind == "linear" and not hcn.inversion
    assert [hcn.forced_zero((i,)) for i in range(3)] == [True, True, False]
    assert hcn.forced_zero((0, 1)) and not hcn.forced_zero((0, 0))
    assert not hcn.forced_zero((2, 2, 2)) and hcn.forced_zero((0, 1, 2))
    # Inversion forbids every odd-rank component (beta = 0: REFERENCES, common
    # practice for centrosymmetric molecules).
    for name in ("ethylene (D2h)", "SF6 (Oh)", "benzene (D6h)"):
        charges, coords, _ = MOLECULES[name]
        sym = detect(charges, coords)
        assert all(sym.forced_zero(idx) for idx in np.ndindex(3, 3, 3)), name
        assert all(sym.forced_zero((i,)) for i in range(3)), name


def test_off_axis_forced_zeros_are_those_of_the_turned_tensor():
    """The same water turned: the invariant tensors are the aligned ones
    turned, so a component is forced to zero exactly when it is zero in
    every turned invariant tensor (here: none of alpha's, in general)."""
    charges, coords, _ = MOLECULES["water (C2v)"]
    q, shift = _turn(7)
    sym = detect(charges, np.array(coords) @ q.T + shift)
    aligned = np.diag([1.3, 0.7, 2.1])  # any alpha of C2v symmetry in its axes
    turned = q @ aligned @ q.T
    for op in sym.operations:  # invariant under every operation found
        assert np.allclose(op @ turned @ op.T, turned, atol=1e-12)
    assert not any(sym.forced_zero((i, j)) for i in range(3) for j in range(3))


def test_images_map_field_vectors_exactly_and_records_turn_with_them():
    from fieldprop.numerics.plan import FieldPoint
    from fieldprop.points.records import PointRecord

    charges, coords, _ = MOLECULES["water (C2v)"]
    sym = detect(charges, coords)
    h = 0.002
    fields = [(0, 0, 0), (h, 0, 0), (-h, 0, 0), (0, h, 0), (0, -h, 0), (0, 0, h), (0, 0, -h),
              (h, h, 0), (-h, -h, 0), (h, -h, 0)]
    found = images(fields, sym)
    computed = [i for i, (j, op) in enumerate(found) if op is None]
    assert computed == [0, 1, 3, 5, 6, 7]  # -x, -y and the diagonals are mirror images
    for i, (j, op) in enumerate(found):
        if op is not None:
            assert j < i and np.array_equal(op @ np.array(fields[j]), np.array(fields[i]))
    # A record's dipole and alpha turn with the field: mu -> R mu, alpha -> R alpha R^T.
    mu, alpha = (0.1, 0.2, 0.3), ((1.0, 0.1, 0.2), (0.1, 2.0, 0.3), (0.2, 0.3, 3.0))
    rec = PointRecord(FieldPoint(1, (1, 0, 0), 0, fields[1]), -76.0, -76.0, mu, 9, ("diis",),
                      0.0, 1.0, 1e-12, alpha)
    op = found[2][1]
    turned = image_record(rec, op, FieldPoint(2, (-1, 0, 0), 0, fields[2]))
    assert np.allclose(turned.dipole_au, op @ np.array(mu))
    assert np.allclose(turned.alpha_au, op @ np.array(alpha) @ op.T)
    assert turned.energy_au == rec.energy_au and turned.scf_cycles == 0


def test_a_linear_molecule_relates_fields_of_equal_axial_and_radial_parts():
    axis = np.array([1.0, 2.0, 2.0]) / 3.0  # a linear molecule off every axis
    sym = detect((1, 9), [tuple(-1.0 * axis), tuple(0.8 * axis)])
    assert sym.kind == "linear" and np.allclose(abs(sym.axis @ axis), 1.0)
    f = np.array([0.002, -0.001, 0.0005])
    rotated = sym.relate(f, f)
    assert rotated is not None
    other = 0.0015 * np.cross(axis, [0, 0, 1]) / np.linalg.norm(np.cross(axis, [0, 0, 1]))
    g = (f @ axis) * axis + np.linalg.norm(f - (f @ axis) * axis) / 0.0015 * other
    op = sym.relate(g, f)
    assert op is not None and np.allclose(op @ f, g, atol=1e-15)
    assert sym.relate(-f, f) is None  # no inversion centre in HF


def test_point_group_symbols_of_lower_and_dihedral_groups():
    def rz(t):
        c, s = math.cos(t), math.sin(t)
        return np.array([[c, -s, 0], [s, c, 0], [0, 0, 1]])

    carbons = [(0, 0, 1.45), (0, 0, -1.45)]
    top = [tuple(rz(2 * math.pi * k / 3) @ np.array([1.9, 0, 2.2])) for k in range(3)]
    staggered = [tuple(rz(2 * math.pi * k / 3 + math.pi / 3) @ np.array([1.9, 0, -2.2]))
                 for k in range(3)]
    eclipsed = [(x, y, -z) for x, y, z in top]
    ethane = (6, 6) + (1,) * 6
    assert detect(ethane, carbons + top + staggered).name == "D3d, 12 operations"
    assert detect(ethane, carbons + top + eclipsed).name == "D3h, 12 operations"
    trans = [(0, 1.2, 0), (0, -1.2, 0), (0, 1.8, 1.8), (0, -1.8, -1.8)]
    assert detect((7, 7, 1, 1), trans).name == "C2h, 4 operations"
    skew = [(0, 1.4, 0), (0, -1.4, 0), (1.5, 1.8, 0.5), (-1.5, -1.8, 0.5)]
    assert detect((8, 8, 1, 1), skew).name == "C2, 2 operations"
    t = 0.5
    twisted = [(0, 0, 1.26), (0, 0, -1.26), (0, 1.75, 2.33), (0, -1.75, 2.33),
               (1.75 * math.sin(t), 1.75 * math.cos(t), -2.33),
               (-1.75 * math.sin(t), -1.75 * math.cos(t), -2.33)]
    assert detect((6, 6, 1, 1, 1, 1), twisted).name == "D2, 4 operations"


@pytest.mark.parametrize("name", MOLECULES)
def test_the_symmetry_frame_makes_the_operations_lattice_maps(name):
    """Off its axes, each molecule gets a frame in which as many operations
    permute the stencil lattice as in its own axes (C3v, D6h: only the
    subgroup a cubic lattice can carry); aligned, the input frame is kept."""
    from fieldprop.numerics.symmetry import _lattice_operations

    charges, coords, order = MOLECULES[name]
    aligned = detect(charges, coords)
    assert aligned.frame() is None
    in_axes = _lattice_operations(aligned.operations, np.eye(3))
    q, shift = _turn(11)
    turned = detect(charges, np.array(coords) @ q.T + shift)
    frame = turned.frame()
    assert np.allclose(frame @ frame.T, np.eye(3), atol=1e-11)
    assert _lattice_operations(turned.operations, frame) == in_axes
    assert in_axes == {"C3v": 2, "D6h": 8}.get(name.split("(")[1][:-1], order)


@pytest.mark.parametrize("name", list(MOLECULES))
def test_a_framework_symmetric_only_to_the_tolerance_gets_exact_operations(name):
    # A force-field geometry is symmetric only to ~1e-7 bohr. Operations found
    # from it are that inexact, and an image's dipole R mu would carry the error
    # into every derivative (1e-7 of mu over h^2 is ~0.1 au of beta); worse, the
    # forced zeros computed from them were all of them (the dipole of ammonia
    # came out zero by "symmetry"). The operations must come out exact.
    from fieldprop.numerics.symmetry import _invariant_basis

    charges, coords, order = MOLECULES[name]
    q, shift = _turn(11)
    exact = detect(charges, np.array(coords, dtype=float) @ q.T + shift)
    rng = np.random.default_rng(5)
    x = np.array(coords, dtype=float) @ q.T + shift
    x += rng.uniform(-0.3, 0.3, size=x.shape) * SYMMETRY_TOLERANCE_BOHR
    sym = detect(charges, x)
    assert len(sym.operations) == order and sym.name == exact.name
    ops = sym.operations
    for a in ops:
        assert np.abs(a @ a.T - np.eye(3)).max() < 1e-13
        for b in ops:  # closed under products, to round-off
            assert min(np.abs(a @ b - c).max() for c in ops) < 1e-12
    centred = sym.coords_bohr - sym.centre
    for op in ops:  # the symmetrised framework maps onto itself
        image = centred @ op.T
        assert max(np.linalg.norm(centred - p, axis=1).min() for p in image) < 1e-10
    for rank in (1, 2, 3):  # the same invariant tensors as the exact framework
        assert _invariant_basis(sym, rank).shape == _invariant_basis(exact, rank).shape


def _turned(coords, decimals=None):
    from scipy.spatial.transform import Rotation

    q = Rotation.from_euler("zyx", [37.0, 23.0, -61.0], degrees=True).as_matrix()
    x = np.asarray(coords, dtype=float) @ q.T + np.array([0.31, -0.17, 0.52])
    return x if decimals is None else np.round(x, decimals)


@pytest.mark.parametrize("name", ["water (C2v)", "ammonia (C3v)", "methane (Td)"])
def test_symmetric_to_round_off_or_only_near(name):
    """Exact: in the axes, or turned in double precision. Near: the same
    turned geometry typed to six decimals (~1e-6 off): found, not exact,
    and exact once symmetrised."""
    charges, coords, order = MOLECULES[name]
    for exact in (coords, _turned(coords)):
        sym = detect(charges, exact)
        assert sym is not None and len(sym.operations) == order and sym.exact
        assert sym.moved_bohr <= sym.roundoff_bohr < 1e-13
    near = detect(charges, _turned(coords, 6))
    assert near is not None and len(near.operations) == order and not near.exact
    assert 1e-8 < near.moved_bohr <= SYMMETRY_TOLERANCE_BOHR
    again = detect(charges, near.coords_bohr)
    assert again is not None and again.exact


def test_symmetrise_like_restores_a_group_in_the_axes_exactly():
    """An optimiser's structure tilted and shifted by ~1e-7 bohr goes back onto
    the starting geometry's group about its centre: mirror images bit for bit,
    atoms on the axis exactly on it."""
    from fieldprop.numerics.symmetry import symmetrise_like

    charges = (6, 8, 1, 1)
    start = np.array([[0, 0, -1.0], [0, 0, 1.28], [0, 1.78, -2.1], [0, -1.78, -2.1]])
    group = detect(charges, start)
    rng = np.random.default_rng(5)
    noisy = start * (1 + 1e-3) + rng.normal(scale=1e-7, size=start.shape)
    fixed = symmetrise_like(group, charges, noisy)
    assert np.all(fixed[:, 0] == 0.0) and np.all(fixed[:2, 1] == 0.0)
    assert fixed[2, 1] == -fixed[3, 1] and fixed[2, 2] == fixed[3, 2]
    assert np.abs(fixed - noisy).max() < 1e-6
    # A framework of another shape does not share the group.
    assert symmetrise_like(group, charges, noisy + np.array([0.0, 0.3, 0.0]) * [[0], [0], [1],
                                                                                   [0]]) is None
