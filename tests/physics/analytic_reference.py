"""Analytic (coupled-perturbed) static electric response, used as an
independent reference for finite-field results in the physics tests.

Conventions: atomic units throughout; an electron in a uniform field F feels
the extra one-electron term ``+F.r``, so mu(F) = mu0 + alpha F and
E(F) = E0 - mu0.F - F.alpha.F / 2 (Taylor convention).
"""
import numpy
from pyscf.scf import cphf, hf, rohf, ucphf, uhf

_TOL = 1e-11
_MAX_CYCLE = 200
_MAX_REFINE = 6
# Relative CPHF residual ||(e_a - e_i) U + V[U] + h1|| / ||h1|| aimed at.
_RESIDUAL_TOL = 1e-10
# Accepted when refinement no longer gains: a DFT kernel integrated on a grid
# stalls it near the target (OH at UKS/PBE, 6-31G: 1.04e-10); alpha then errs
# by ~1e-9 relative, far below any error bar these references are held to.
_RESIDUAL_ACCEPT = 1e-9


def _dipole_ints(mol, origin_bohr):
    with mol.with_common_orig(numpy.asarray(origin_bohr, dtype=float)):
        return mol.intor_symmetric('int1e_r', comp=3)


def _flat(x):
    # Explicit sizes: reshape(n, -1) fails on empty spin blocks (no beta occ).
    return x.reshape(x.shape[0], int(numpy.prod(x.shape[1:])))


def _one_electron_hessian(mf, coeff, energy, occ):
    """Orbital-hessian correction for a one-electron Hartree-Fock system.

    For one electron the HF two-electron energy vanishes identically (J = K for
    a single occupied spin orbital), so the exact hessian is that of the bare
    core Hamiltonian: h_ab d_ij - h_ij d_ab. PySCF's one-electron UHF
    diagonalises bare h but ``gen_response`` would still add two-electron
    response (H atom alpha ~18.4 instead of 4.476 in aug-cc-pVTZ). Using the
    bare-h hessian minus the orbital-energy diagonal keeps the result
    exact whether the orbitals came from bare h (term ~0) or from a regular
    SCF whose virtual energies contain J - K of the occupied orbital.
    """
    h = mf.get_hcore()
    o, v = occ > 0, occ == 0
    hvv = coeff[:, v].T @ h @ coeff[:, v] - numpy.diag(energy[v])
    hoo = coeff[:, o].T @ h @ coeff[:, o] - numpy.diag(energy[o])
    return lambda u: hvv @ u - u @ hoo


def cphf_polarizability(mf, origin_bohr=(0.0, 0.0, 0.0)):
    """Analytic static dipole polarizability from the CPHF/CPKS equations.

    Parameters
    ----------
    mf : pyscf RHF, UHF, RKS or UKS object
        Converged mean-field calculation (field-free).
    origin_bohr : sequence of 3 floats
        Origin of the dipole operator in bohr. alpha does not depend on it for
        a complete solve; it is exposed to match finite-field set-ups.

    Returns
    -------
    numpy.ndarray, shape (3, 3)
        Symmetric alpha_ij = -d2E/dF_i dF_j = d mu_i / d F_j in atomic units
        (e^2 a0^2 / Eh); positive diagonal for a normal molecule.

    Raises
    ------
    TypeError
        For ROHF/ROKS, GHF/GKS or any other mean-field type.
    RuntimeError
        If the CPHF residual is not converged.
    """
    mol = mf.mol
    r = _dipole_ints(mol, origin_bohr)
    # UKS derives from UHF and RKS from RHF. ROHF/ROKS also derive from RHF but
    # the closed-shell response would be wrong for them, so they are rejected.
    if isinstance(mf, uhf.UHF):
        coeffs, energies, occs = mf.mo_coeff, mf.mo_energy, mf.mo_occ
        nocc_per_orb, solver = 1, ucphf.solve
    elif isinstance(mf, hf.RHF) and not isinstance(mf, rohf.ROHF):
        coeffs, energies, occs = [mf.mo_coeff], [mf.mo_energy], [mf.mo_occ]
        nocc_per_orb, solver = 2, cphf.solve
    else:
        raise TypeError('cphf_polarizability supports RHF, UHF, RKS and UKS '
                        f'only, not {type(mf).__name__} (ROHF/GHF excluded)')
    # Work with a list of spin blocks (one for restricted, two for unrestricted).
    orbs = [(c[:, o > 0], c[:, o == 0]) for c, o in zip(coeffs, occs)]
    h1 = [numpy.einsum('xpq,pa,qi->xai', r, cv, co) for co, cv in orbs]
    diag = [e[o == 0, None] - e[o > 0] for e, o in zip(energies, occs)]
    shapes = [x.shape[1:] for x in h1]
    sizes = [a * b for a, b in shapes]

    if mol.nelectron == 1 and not isinstance(mf, hf.KohnShamDFT):
        corr = [_one_electron_hessian(mf, c, e, o)
                for c, e, o in zip(coeffs, energies, occs)]

        def respond(us):
            return [numpy.array([f(x) for x in u]) for f, u in zip(corr, us)]
    else:
        vresp = (mf.gen_response(hermi=1) if nocc_per_orb == 1 else
                 mf.gen_response(singlet=None, hermi=1))

        def respond(us):
            # Density response n (C_v U C_o^T + h.c.), n = electrons per orbital.
            dm = numpy.array([[cv @ x @ co.T for x in u]
                              for (co, cv), u in zip(orbs, us)]) * nocc_per_orb
            dm = dm + dm.transpose(0, 1, 3, 2)
            # The restricted response takes the total density, no spin axis.
            v1 = vresp(dm) if nocc_per_orb == 1 else vresp(dm[0])[None]
            return [numpy.einsum('xpq,pa,qi->xai', v, cv, co)
                    for v, (co, cv) in zip(v1, orbs)]

    def split(flat):
        flat = flat.reshape(-1, sum(sizes))
        bounds = numpy.cumsum([0] + sizes)
        return [flat[:, a:b].reshape(len(flat), *shp)
                for a, b, shp in zip(bounds[:-1], bounds[1:], shapes)]

    def fvind(flat):
        return numpy.hstack([_flat(x) for x in respond(split(flat))])

    def solve(rhs):
        # Both solvers return U with (e_a - e_i) U + V[U] = -rhs. The Krylov
        # lindep threshold is absolute, so feed it a unit-norm right-hand side.
        s = max(max(numpy.linalg.norm(x) for x in rhs), 1e-300)
        rhs = [x / s for x in rhs]
        if nocc_per_orb == 2:
            u = [solver(fvind, energies[0], occs[0], rhs[0],
                        max_cycle=_MAX_CYCLE, tol=_TOL)[0]]
        else:
            u = solver(fvind, energies, occs, tuple(rhs),
                       max_cycle=_MAX_CYCLE, tol=_TOL)[0]
        return [x * s for x in u]

    # The Krylov solver stops on an absolute linear-dependence threshold and
    # never reports failure, so polish by iterative refinement on the residual.
    scale = max(max(numpy.linalg.norm(x) for x in h1), 1e-300)
    u = solve(h1)
    for _ in range(_MAX_REFINE):
        resid = [d * x + v + b for d, x, v, b in zip(diag, u, respond(u), h1)]
        worst = max(numpy.linalg.norm(x) for x in resid) / scale
        if worst < _RESIDUAL_TOL:
            break
        u = [x + dx for x, dx in zip(u, solve(resid))]
    else:
        if not worst < _RESIDUAL_ACCEPT:
            raise RuntimeError(f'CPHF not converged: relative residual {worst:.2e}')
    # d mu_i/dF_j = -tr(r_i dD_j) with dD = n (C_v U_j C_o^T + h.c.).
    alpha = -2 * nocc_per_orb * sum(numpy.einsum('xai,yai->xy', b, x)
                                    for b, x in zip(h1, u))
    return 0.5 * (alpha + alpha.T)


def scf_dipole(mf, origin_bohr=(0.0, 0.0, 0.0)):
    """Analytic SCF dipole moment about ``origin_bohr``.

    Parameters
    ----------
    mf : pyscf mean-field object
        Any converged SCF; for spin-unrestricted densities the spins are summed.
    origin_bohr : sequence of 3 floats
        Reference point in bohr (matters only for charged systems).

    Returns
    -------
    numpy.ndarray, shape (3,)
        mu = sum_A Z_A (R_A - O) - tr(D (r - O)) in atomic units (e a0);
        physics sign convention (points from negative to positive charge).
    """
    mol = mf.mol
    origin = numpy.asarray(origin_bohr, dtype=float)
    dm = numpy.asarray(mf.make_rdm1())
    if dm.ndim == 3:
        dm = dm[0] + dm[1]
    nuc = numpy.einsum('a,ax->x', mol.atom_charges(), mol.atom_coords() - origin)
    return nuc - numpy.einsum('xpq,qp->x', _dipole_ints(mol, origin), dm).real
