"""The polarizable continuum of a solvated model, made cheap to apply often.

PySCF's PCM (``mf.PCM()``) recomputes, every time the continuum answers a
density, the three-index integrals between the basis-function pairs and the
surface charges, and solves its dense surface equations from scratch: fine for
one SCF, but a field point's Newton steps apply the continuum's response in
every orbital-Hessian product, and a job has dozens of points. :func:`cache`
gives one PCM object (shared by every point of a model in a process) the
same arithmetic with the integrals kept (where they fit in
:data:`MAX_CACHED_BYTES`) and the surface matrix LU-factorised once: the
numbers are PySCF's, to round-off (tested against its energies in fields).
"""

from __future__ import annotations

import types

import numpy as np

#: Keep the (nao, nao, surface points) integrals when they take at most this
#: (bytes); larger models recompute them per application, as PySCF does.
MAX_CACHED_BYTES = 1 << 30


def cache(pcm) -> None:
    """Make ``pcm`` (a pyscf.solvent.pcm.PCM) keep its surface integrals and
    the factorised surface matrix; a rebuild (new geometry) drops them."""
    store: dict = {}

    def _current():
        if not pcm._intermediates:
            pcm.build()
        k = pcm._intermediates["K"]
        if store.get("K") is not k:  # built anew (a new geometry): drop what was kept
            import scipy.linalg

            store.clear()
            store["K"] = k
            store["lu"] = scipy.linalg.lu_factor(k)
        return store

    def _integrals():
        current = _current()
        if "v" not in current:
            from pyscf import df, gto

            mol = pcm.mol
            coords, exponents = pcm.surface["grid_coords"], pcm.surface["charge_exp"]
            if mol.nao ** 2 * len(coords) * 8 > MAX_CACHED_BYTES:
                current["v"] = None
            else:
                fake = gto.fakemol_for_charges(coords, expnt=exponents ** 2)
                fake.cart = mol.cart
                current["v"] = df.incore.aux_e2(mol, fake, intor=mol._add_suffix("int3c2e"),
                                                aosym="s1").reshape(mol.nao ** 2, -1)
        return current["v"]

    original_v, original_vmat = pcm._get_v, pcm._get_vmat

    def _get_v(self, dms):
        v = _integrals()
        if v is None:
            return original_v(dms)
        nao = dms.shape[-1]
        return dms.reshape(-1, nao * nao) @ v

    def _get_vmat(self, q):
        v = _integrals()
        if v is None:
            return original_vmat(q)
        nao = self.mol.nao
        q = np.asarray(q).reshape(-1, v.shape[1])
        return -(q @ v.T).reshape(-1, nao, nao)

    def _charges(self, v_grids):
        """The symmetrised surface charges of potentials ``v_grids`` (nset, n):
        PySCF's (q + q^T)/2 with K solved by the kept factorisation."""
        import scipy.linalg

        lu = _current()["lu"]
        r = self._intermediates["R"]
        q = scipy.linalg.lu_solve(lu, r @ v_grids.T).T
        qt = (r.T @ scipy.linalg.lu_solve(lu, v_grids.T, trans=1)).T
        return (q + qt) / 2.0, q

    def _get_vind(self, dms):
        _current()
        nao = dms.shape[-1]
        dms = dms.reshape(-1, nao, nao)
        if dms.shape[0] == 2:
            dms = (dms[0] + dms[1]).reshape(-1, nao, nao)
        v_grids = self.v_grids_n - self._get_v(dms)
        q_sym, q = _charges(self, v_grids)
        vmat = self._get_vmat(q_sym)
        epcm = 0.5 * np.dot(q_sym[0], v_grids[0])
        self._intermediates["q"] = q[0]
        self._intermediates["q_sym"] = q_sym[0]
        self._intermediates["v_grids"] = v_grids[0]
        self._intermediates["dm"] = dms
        return epcm, vmat[0]

    def _B_dot_x(self, dms):
        _current()
        shape = dms.shape
        nao = dms.shape[-1]
        dms = dms.reshape(-1, nao, nao)
        q_sym, _ = _charges(self, -self._get_v(dms))
        return self._get_vmat(q_sym).reshape(shape)

    pcm._get_v = types.MethodType(_get_v, pcm)
    pcm._get_vmat = types.MethodType(_get_vmat, pcm)
    pcm._get_vind = types.MethodType(_get_vind, pcm)
    pcm._B_dot_x = types.MethodType(_B_dot_x, pcm)
