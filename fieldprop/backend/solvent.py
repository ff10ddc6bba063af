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

import weakref

import numpy as np

def solvent_table() -> dict[str, tuple[float, float]]:
    """{name (lower case): (static dielectric constant, refractive index)}:
    the Minnesota Solvent Descriptor Database as PySCF carries it
    (pyscf.solvent.smd.solvent_db; C. P. Kelly, C. J. Cramer and D. G. Truhlar
    and earlier editions, University of Minnesota)."""
    from pyscf.solvent.smd import solvent_db

    return {name.lower(): (float(v[5]), float(v[0])) for name, v in solvent_db.items()}


#: Keep the (nao, nao, surface points) integrals when they take at most this
#: (bytes); larger models recompute them per application, as PySCF does.
MAX_CACHED_BYTES = 1 << 30


def cache(pcm) -> None:
    """Make ``pcm`` (a pyscf.solvent.pcm.PCM) keep its surface integrals and
    the factorised surface matrix. Its class becomes a subclass whose methods
    keep them per object, keyed by the surface matrix itself: a rebuild (a
    new geometry) or a copy that PySCF changes (its excited states' copy with
    the optical dielectric constant) computes its own."""
    base = type(pcm)
    if getattr(base, "_fieldprop_cached", False):
        return
    pcm.__class__ = _cached_class(base)


_CLASSES: dict = {}
#: Per PCM object: {"K": its surface matrix, "lu": its factorisation, "v": integrals}.
_KEPT: weakref.WeakKeyDictionary = weakref.WeakKeyDictionary()


def _kept(pcm) -> dict:
    """What ``pcm`` keeps, made anew when its surface matrix changed."""
    if not pcm._intermediates:
        pcm.build()
    k = pcm._intermediates["K"]
    store = _KEPT.get(pcm)
    if store is None or store["K"] is not k:
        import scipy.linalg

        store = {"K": k, "lu": scipy.linalg.lu_factor(k)}
        _KEPT[pcm] = store
    return store


def _integrals(pcm):
    """The (nao^2, surface points) integrals of ``pcm``'s surface charges, or
    None where they would not fit in MAX_CACHED_BYTES."""
    store = _kept(pcm)
    if "v" not in store:
        from pyscf import df, gto

        mol = pcm.mol
        coords, exponents = pcm.surface["grid_coords"], pcm.surface["charge_exp"]
        if mol.nao ** 2 * len(coords) * 8 > MAX_CACHED_BYTES:
            store["v"] = None
        else:
            fake = gto.fakemol_for_charges(coords, expnt=exponents ** 2)
            fake.cart = mol.cart
            store["v"] = df.incore.aux_e2(mol, fake, intor=mol._add_suffix("int3c2e"),
                                          aosym="s1").reshape(mol.nao ** 2, -1)
    return store["v"]


def _cached_class(base):
    if base in _CLASSES:
        return _CLASSES[base]

    class Cached(base):
        _fieldprop_cached = True

        def _get_v(self, dms):
            v = _integrals(self)
            if v is None:
                return super()._get_v(dms)
            nao = dms.shape[-1]
            return dms.reshape(-1, nao * nao) @ v

        def _get_vmat(self, q):
            v = _integrals(self)
            if v is None:
                return super()._get_vmat(q)
            nao = self.mol.nao
            q = np.asarray(q).reshape(-1, v.shape[1])
            return -(q @ v.T).reshape(-1, nao, nao)

        def _charges(self, v_grids):
            """PySCF's symmetrised surface charges (q + q^T)/2 of potentials
            ``v_grids`` (nset, n), K solved by the kept factorisation."""
            import scipy.linalg

            lu = _kept(self)["lu"]
            r = self._intermediates["R"]
            q = scipy.linalg.lu_solve(lu, r @ v_grids.T).T
            qt = (r.T @ scipy.linalg.lu_solve(lu, v_grids.T, trans=1)).T
            return (q + qt) / 2.0, q

        def _get_vind(self, dms):
            _kept(self)
            nao = dms.shape[-1]
            dms = dms.reshape(-1, nao, nao)
            if dms.shape[0] == 2:
                dms = (dms[0] + dms[1]).reshape(-1, nao, nao)
            v_grids = self.v_grids_n - self._get_v(dms)
            q_sym, q = self._charges(v_grids)
            vmat = self._get_vmat(q_sym)
            epcm = 0.5 * np.dot(q_sym[0], v_grids[0])
            self._intermediates["q"] = q[0]
            self._intermediates["q_sym"] = q_sym[0]
            self._intermediates["v_grids"] = v_grids[0]
            self._intermediates["dm"] = dms
            return epcm, vmat[0]

        def _B_dot_x(self, dms):
            _kept(self)
            shape = dms.shape
            nao = dms.shape[-1]
            dms = dms.reshape(-1, nao, nao)
            q_sym, _ = self._charges(-self._get_v(dms))
            return self._get_vmat(q_sym).reshape(shape)

    Cached.__name__ = Cached.__qualname__ = f"Cached{base.__name__}"
    _CLASSES[base] = Cached
    return Cached
