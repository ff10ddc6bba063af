"""The PySCF molecule and mean-field object of a model: building the ``Mole``
(basis, effective core potentials, cartesian functions), checking before any
work what only PySCF can judge (basis, functional, auxiliary basis, atoms too
close for the units given), the frozen core, and the backend versions a model
is computed with.
"""

from __future__ import annotations

import contextlib
import io
import warnings

import numpy as np

from fieldprop.errors import FieldpropError, InputError
from fieldprop.inputs.job import Job
from fieldprop.numerics.methods import METHODS
from fieldprop.numerics.units import BACKEND_BOHR_ANGSTROM


def _pyscf_basis(basis):
    """A name, or {symbol: name or parsed NWChem-format text} for per-element bases."""
    from pyscf import gto

    if isinstance(basis, str):
        return basis
    out = {}
    for symbol, text in basis:
        out[symbol] = gto.basis.parse(text, symb=symbol) if "\n" in text.strip() else text
    return out


@contextlib.contextmanager
def _quiet_basis_lookup():
    """PySCF's advice to install basis-set-exchange, printed for a basis or ECP name
    it does not know, and NumPy's warnings on normalising a zero or negative
    exponent, would add lines to the one-line errors of bad input: silenced."""
    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", message=".*may be available in basis-set-exchange")
        warnings.filterwarnings("ignore", category=RuntimeWarning)
        yield


def _pyscf_ecp(basis, symbols) -> dict[str, str]:
    """{symbol: basis name} for the elements whose named basis comes with an
    effective core potential (def2 and LANL sets on heavy elements, as PySCF's
    basis library defines them); basis text given inline has none."""
    from pyscf import gto

    names = ({s: basis for s in set(symbols)} if isinstance(basis, str)
             else {s: t for s, t in basis if "\n" not in t.strip()})
    out = {}
    for symbol, name in names.items():
        try:
            with _quiet_basis_lookup():
                if gto.basis.load_ecp(name, symbol):
                    out[symbol] = name
        except (KeyError, RuntimeError, ValueError, OSError, IndexError):
            continue  # the basis itself is judged (and refused) by build_mole
    return out


def build_mole(molecule, basis, where: str = "[model] basis", cartesian: bool = False):
    """A PySCF ``Mole`` in bohr, with the basis' effective core potentials where it
    has them; basis problems become InputError naming ``where``."""
    from pyscf import gto

    try:
        if not isinstance(basis, str):
            # Checked before PySCF, which would print a warning line of its own.
            absent = sorted(set(molecule.symbols) - {symbol for symbol, _ in basis})
            if absent:
                raise ValueError(f"no basis given for {', '.join(absent)}")
        with _quiet_basis_lookup():
            mol = gto.M(atom=[(s, c) for s, c in zip(molecule.symbols, molecule.coords_bohr)],
                        unit="Bohr", basis=_pyscf_basis(basis),
                        ecp=_pyscf_ecp(basis, molecule.symbols), charge=molecule.charge,
                        spin=molecule.spin, cart=cartesian, verbose=0)
        missing = sorted({s for s in molecule.symbols} - {mol.atom_symbol(i) for i in
                                                          range(mol.natm) if mol.atom_nshells(i)})
        if missing:
            raise KeyError(f"no basis functions for {', '.join(missing)}")
        if not np.all(np.isfinite(mol._env)):
            raise ValueError("exponents must be > 0 and coefficients finite")
        return mol
    except (KeyError, RuntimeError, ValueError, OSError, IndexError) as exc:
        text = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
        shown = basis if isinstance(basis, str) else {
            sym: (text if "\n" not in text else "<basis text>") for sym, text in basis}
        raise InputError(f"{where} {shown!r} is not available for this molecule "
                         f"({text}); use a basis PySCF knows for every element, such as "
                         "cc-pvdz, aug-cc-pvdz or def2-svp") from None


#: Atoms closer than this fraction of the sum of their covalent radii (PySCF's
#: table, pyscf.data.radii.COVALENT) are refused as a likely unit mistake: the
#: shortest real bonds are ~0.75 of it; O-H given in angstrom but read as bohr
#: comes out at 0.53 of it, C-C at 0.54.
CLOSE_FRACTION = 0.6


def _refuse_close_atoms(job: Job, molecule) -> None:
    """One line naming the pair, the distance and the other unit, unless the job
    sets [molecule] allow_close_atoms = true."""
    from pyscf.data import radii
    from pyscf.data.elements import charge as atomic_number

    if job.molecule.allow_close_atoms:
        return
    coords = np.asarray(molecule.coords_bohr)
    symbols = molecule.symbols
    covalent = [float(radii.COVALENT[atomic_number(s)]) for s in symbols]
    to_unit = 1.0 / job.molecule.unit_scale
    other = "bohr" if job.molecule.units == "angstrom" else "angstrom"
    for i in range(len(symbols)):
        for j in range(i):
            d = float(np.linalg.norm(coords[i] - coords[j]))
            bond = covalent[i] + covalent[j]
            if d < CLOSE_FRACTION * bond:
                raise InputError(
                    f"{job.path}: [molecule] units = \"{job.molecule.units}\": atoms {j + 1} "
                    f"({symbols[j]}) and {i + 1} ({symbols[i]}) are {d * to_unit:.3f} "
                    f"{job.molecule.units} apart, {d / bond:.2f} of their covalent bond length "
                    f"({bond * to_unit:.3f} {job.molecule.units}); were the coordinates in "
                    f"{other}? Set units = \"{other}\", or allow_close_atoms = true if the "
                    "structure is meant")


def backend_versions(method: str) -> dict:
    """The versions this process computes a model with, as backend facts
    (keys.BACKEND_VERSION_FACTS): PySCF's, and for DFT the libxc library's."""
    import pyscf

    versions = {"pyscf_version": pyscf.__version__}
    if method == "dft":
        from pyscf.dft import libxc

        versions["libxc_version"] = libxc.libxc_version()
    return versions


def validate(job: Job, molecule) -> dict:
    """Check what only PySCF can judge (basis, functional) before any work.

    Returns facts for provenance: number of basis functions, Cartesian or
    spherical functions, the electrons each atom's effective core potential
    replaces (0 without one), the functional as libxc parses it, PySCF's version
    and for DFT libxc's (backend_versions).
    """
    import pyscf
    from pyscf.data.nist import BOHR
    from pyscf.dft import libxc

    if BOHR != BACKEND_BOHR_ANGSTROM:
        # The job's angstrom was turned into bohr with units.BACKEND_BOHR_ANGSTROM,
        # which no longer is PySCF's: the molecule would not be the one PySCF
        # builds from the same XYZ.
        raise FieldpropError(f"PySCF {pyscf.__version__} converts angstrom with a bohr of "
                             f"{BOHR!r} angstrom, fieldprop's default is PySCF's former "
                             f"{BACKEND_BOHR_ANGSTROM!r}; update fieldprop, or set "
                             f"[molecule] bohr_angstrom = {BOHR!r} in {job.path}")
    _refuse_close_atoms(job, molecule)
    mol = build_mole(molecule, job.model.basis, f"{job.path}: [model] basis",
                     job.model.cartesian)
    facts = {**backend_versions(job.model.method), "n_basis_functions": int(mol.nao),
             "basis_functions": "cartesian" if mol.cart else "spherical",
             "core_electrons": [int(mol.atom_nelec_core(i)) for i in range(mol.natm)]}
    if job.model.method == "dft":
        try:
            libxc.parse_xc(job.model.functional)
        except (KeyError, ValueError, TypeError) as exc:
            raise InputError(f"{job.path}: [model] functional {job.model.functional!r} is "
                             f"unknown to libxc ({exc}); use a name such as b3lyp, pbe0, "
                             "pbe, cam-b3lyp") from None
        facts["functional_is_hybrid"] = bool(libxc.is_hybrid_xc(job.model.functional))
        facts["grid_level"] = job.scf.grid_level
    if job.model.density_fit is not None:
        facts.update(auxiliary_basis(job, mol))
    if not METHODS[job.model.method].mean_field:
        frozen = frozen_orbitals(mol, job.model)
        facts["frozen_core_orbitals"] = frozen
        facts["correlated_electrons"] = int(mol.nelectron) - 2 * frozen
    return facts


def auxiliary_basis(job: Job, mol) -> dict:
    """The density-fitting basis of ``job`` checked on ``mol``: its name (PySCF's
    choice for "auto") and number of functions, for provenance."""
    from pyscf import df

    name = job.model.density_fit
    aux = df.make_auxbasis(mol) if name == "auto" else name
    try:
        # PySCF explains a missing basis on stdout and in a warning: the one
        # line below says it.
        with contextlib.redirect_stdout(io.StringIO()), warnings.catch_warnings():
            warnings.simplefilter("ignore")
            auxmol = df.addons.make_auxmol(mol, aux)
    except (KeyError, RuntimeError, ValueError, TypeError, OSError) as exc:
        why = " ".join(str(exc).split())
        raise InputError(f"{job.path}: [model] density_fit {name!r} is not an auxiliary basis "
                         f"PySCF has for every element ({type(exc).__name__}: {why}); use "
                         "true for PySCF's default, or a name such as def2-universal-jkfit"
                         ) from None
    label = aux if isinstance(aux, str) else {k: v if isinstance(v, str) else "generated"
                                              for k, v in sorted(aux.items())}
    return {"auxiliary_basis": label, "n_auxiliary_functions": int(auxmol.nao)}


def frozen_orbitals(mol, model) -> int:
    """Core orbitals a correlated method leaves out (PySCF's chemcore, which
    counts an effective core potential's electrons as gone), or 0."""
    from pyscf.data.elements import chemcore

    return int(chemcore(mol)) if model.frozen_core else 0


def _mean_field(mol, model, scf_spec):
    from pyscf import dft, scf

    unrestricted = model.reference == "unrestricted"
    open_shell = mol.spin != 0
    if model.method == "dft":
        cls = dft.UKS if unrestricted else (dft.ROKS if open_shell else dft.RKS)
        mf = cls(mol)
        mf.xc = model.functional
        mf.grids.level = scf_spec.grid_level
    else:
        cls = scf.UHF if unrestricted else (scf.ROHF if open_shell else scf.RHF)
        mf = cls(mol)
    if model.density_fit is not None:
        mf = mf.density_fit(auxbasis=None if model.density_fit == "auto" else model.density_fit)
    if getattr(model, "solvent_epsilon", None) is not None:
        # The solute in a polarizable continuum: the reaction field answers its
        # whole density (the field's share included) self-consistently, and
        # PySCF's response function then includes the continuum's response
        # (equilibrium solvation: the static limit).
        mf = mf.PCM()
        mf.with_solvent.method = {"iefpcm": "IEF-PCM", "cpcm": "C-PCM"}[model.solvent_model]
        mf.with_solvent.eps = model.solvent_epsilon
        mf.with_solvent.equilibrium_solvation = True
        mf.with_solvent.verbose = 0
        from fieldprop.backend.solvent import cache

        cache(mf.with_solvent)
    mf.conv_tol = scf_spec.energy_conv_tol_au
    mf.conv_tol_grad = scf_spec.gradient_target
    mf.max_cycle = scf_spec.max_iterations
    mf.verbose = 0
    # No checkpoint file: the store keeps what is needed, and PySCF's temporary
    # file, inherited by forked workers, would be deleted twice.
    mf.chkfile, mf._chkfile = None, None
    return mf
