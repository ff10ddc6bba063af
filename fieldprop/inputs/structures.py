"""Structures from line notation: a SMILES string as a 3D geometry (RDKit).

Explicit hydrogens, ETKDG embedding with a fixed seed (the same SMILES gives
the same start on every run), then a force-field clean-up (MMFF94 where it
has parameters for every atom, else UFF). A start for the job's own model, not
a minimum of it: optimise it ([geometry] optimize) before trusting response
properties, and note that no conformer search is done.

No PySCF here; RDKit is imported only when a SMILES is given.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

#: The embedding seed: fixed, so a SMILES always gives the same coordinates.
EMBEDDING_SEED = 61453
#: Force-field steps of the clean-up (converges for drug-sized molecules).
FORCE_FIELD_STEPS = 2000


@dataclass(frozen=True)
class SmilesStructure:
    """A 3D structure from a SMILES: symbols, angstrom coordinates, the charge
    (sum of formal charges) and multiplicity (radical electrons + 1) it
    implies, and the force field used."""

    symbols: tuple[str, ...]
    coords_angstrom: tuple[tuple[float, float, float], ...]
    charge: int
    multiplicity: int
    force_field: str
    rdkit_version: str = ""

    @property
    def provenance(self) -> str:
        """How the structure was made, for the job's molecule source."""
        return (f"RDKit {self.rdkit_version}, ETKDG seed {EMBEDDING_SEED}, "
                f"{self.force_field}")

    def geometry_text(self) -> str:
        """``symbol x y z`` lines, angstrom, 10 decimals."""
        return "\n".join(f"{s} {x:.10f} {y:.10f} {z:.10f}"
                         for s, (x, y, z) in zip(self.symbols, self.coords_angstrom))

    def symmetrised_bohr(self, bohr_angstrom: float) -> tuple[str, str]:
        """``symbol x y z`` lines in bohr, made exactly symmetric under the
        point group the force-field structure is near (a force field leaves
        ~1e-7 bohr of asymmetry), each number at full precision (the text
        reads back to the same doubles), and the group's name ("" for none):
        the structure computed is then exactly the one reported."""
        from fieldprop.inputs.job import _Z_OF
        from fieldprop.numerics.symmetry import detect

        coords = np.asarray(self.coords_angstrom, dtype=float) * (1.0 / bohr_angstrom)
        group = detect([_Z_OF[s.lower()] for s in self.symbols], coords)
        if group is not None:
            coords = np.asarray(group.coords_bohr, dtype=float)
        text = "\n".join(f"{s} {float(x)!r} {float(y)!r} {float(z)!r}"
                         for s, (x, y, z) in zip(self.symbols, coords))
        return text, "" if group is None else group.name


def _embedding(smiles: str):
    """(molecule with explicit hydrogens, charge, multiplicity, seeded ETKDG
    parameters) of ``smiles``; ValueError where RDKit cannot parse it."""
    from rdkit import Chem
    from rdkit.Chem import AllChem, Descriptors

    mol = Chem.MolFromSmiles(smiles)
    if mol is None or mol.GetNumAtoms() == 0:
        raise ValueError("RDKit cannot parse it")
    charge = Chem.GetFormalCharge(mol)
    multiplicity = Descriptors.NumRadicalElectrons(mol) + 1
    params = AllChem.ETKDGv3()
    params.randomSeed = EMBEDDING_SEED
    return Chem.AddHs(mol), charge, multiplicity, params


def from_smiles(smiles: str) -> SmilesStructure:
    """The 3D structure of ``smiles``; ValueError with a short reason when it
    cannot be parsed or embedded."""
    import rdkit
    from rdkit.Chem import AllChem
    from rdkit.rdBase import BlockLogs

    quiet = BlockLogs()  # RDKit's own messages, while it lives: ours is the one line
    mol, charge, multiplicity, params = _embedding(smiles)
    if AllChem.EmbedMolecule(mol, params) != 0:
        params.useRandomCoords = True  # RDKit's advice for hard cases; still seeded
        if AllChem.EmbedMolecule(mol, params) != 0:
            raise ValueError("RDKit could not embed it in 3D")
    force_field = "none (one atom)"
    if mol.GetNumAtoms() > 1:
        # 0: converged, 1: steps used up (go on), -1: no parameters (UFF instead).
        status = -1
        if AllChem.MMFFHasAllMoleculeParams(mol):
            force_field = "MMFF94"
            for _ in range(3):
                status = AllChem.MMFFOptimizeMolecule(mol, maxIters=FORCE_FIELD_STEPS)
                if status != 1:
                    break
        if status == -1:
            force_field = "UFF"
            for _ in range(3):
                status = AllChem.UFFOptimizeMolecule(mol, maxIters=FORCE_FIELD_STEPS)
                if status != 1:
                    break
        if status != 0:
            raise ValueError(f"RDKit's {force_field} clean-up did not converge; give an xyz "
                             "geometry instead")
    positions = mol.GetConformer().GetPositions()
    del quiet
    return SmilesStructure(tuple(a.GetSymbol() for a in mol.GetAtoms()),
                           tuple(tuple(float(v) for v in row) for row in positions),
                           int(charge), int(multiplicity), force_field, rdkit.__version__)


def symmetric_rmsd(smiles: str, coords_a_bohr, coords_b_bohr, bohr_angstrom: float) -> float:
    """RMSD (bohr) of two structures of ``smiles`` (atoms in RDKit's order
    with explicit hydrogens, as conformers_from_smiles makes them) after the
    best superposition over the molecule's equivalent-atom permutations
    (RDKit's GetBestRMS; proper rotations only: mirror images stay apart)."""
    from rdkit import Chem
    from rdkit.Chem import rdMolAlign
    from rdkit.Geometry import Point3D

    mol = Chem.AddHs(Chem.MolFromSmiles(smiles))
    mols = []
    for coords in (coords_a_bohr, coords_b_bohr):
        m = Chem.Mol(mol)
        conf = Chem.Conformer(m.GetNumAtoms())
        for i, (x, y, z) in enumerate(np.asarray(coords, dtype=float) * bohr_angstrom):
            conf.SetAtomPosition(i, Point3D(float(x), float(y), float(z)))
        m.AddConformer(conf, assignId=True)
        mols.append(m)
    return float(rdMolAlign.GetBestRMS(mols[0], mols[1])) / bohr_angstrom


@dataclass(frozen=True)
class ConformerOptions:
    """How a SMILES becomes a conformer ensemble (a set file's [conformers]):
    ``embed`` conformers embedded (ETKDG, seeded), cleaned by the force
    field; two whose heavy-atom RMSD (after alignment) is below
    ``rmsd_angstrom`` count once; those more than ``window_kcal_mol`` above
    the lowest force-field energy are dropped; the ``keep`` lowest remain."""

    keep: int = 3
    embed: int = 30
    rmsd_angstrom: float = 0.5
    window_kcal_mol: float = 6.0
    temperature_k: float = 298.15


def conformers_from_smiles(smiles: str, options: ConformerOptions
                           ) -> list[tuple[SmilesStructure, float]]:
    """The conformers of ``smiles`` (see ConformerOptions), lowest force-field
    energy first, each with that energy (kcal/mol); the same on every run
    (seeded embedding, deterministic pruning). ValueError with a short reason
    when it cannot be parsed or embedded."""
    import rdkit
    from rdkit import Chem
    from rdkit.Chem import AllChem, rdMolAlign
    from rdkit.rdBase import BlockLogs

    quiet = BlockLogs()
    mol, charge, multiplicity, params = _embedding(smiles)
    params.numThreads = 1  # the same conformers whatever the machine
    ids = list(AllChem.EmbedMultipleConfs(mol, numConfs=options.embed, params=params))
    if not ids:
        raise ValueError("RDKit could not embed it in 3D")
    if AllChem.MMFFHasAllMoleculeParams(mol):
        force_field = "MMFF94"
        results = AllChem.MMFFOptimizeMoleculeConfs(mol, maxIters=FORCE_FIELD_STEPS,
                                                    numThreads=1)
    else:
        force_field = "UFF"
        results = AllChem.UFFOptimizeMoleculeConfs(mol, maxIters=FORCE_FIELD_STEPS,
                                                   numThreads=1)
    energies = {cid: float(e) for cid, (status, e) in zip(ids, results) if status == 0}
    if not energies:
        raise ValueError(f"RDKit's {force_field} clean-up converged for no conformer; give an "
                         "xyz geometry instead")
    order = sorted(energies, key=lambda c: (round(energies[c], 6), c))
    lowest = energies[order[0]]
    heavy = Chem.RemoveHs(mol)
    kept: list[int] = []
    for cid in order:
        if energies[cid] - lowest > options.window_kcal_mol:
            break
        if any(rdMolAlign.GetBestRMS(heavy, heavy, k, cid) < options.rmsd_angstrom
               for k in kept):
            continue
        kept.append(cid)
        if len(kept) == options.keep:
            break
    del quiet
    symbols = tuple(a.GetSymbol() for a in mol.GetAtoms())
    return [(SmilesStructure(symbols, tuple(tuple(float(v) for v in row)
                                            for row in mol.GetConformer(cid).GetPositions()),
                             int(charge), int(multiplicity), force_field, rdkit.__version__),
             energies[cid] - lowest) for cid in kept]
