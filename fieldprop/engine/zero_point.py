"""Zero-point vibrational averaging ([response] zero_point): the displaced
geometries, their gradients, and the correction of every tensor.

The job stands at its zero-field minimum (engine.geometry.relaxed_reference:
the frame of the nuclear relaxation, whose Hessian gives the harmonic modes).
Each mode is displaced by +-s in its dimensionless coordinate for the two
steps of :data:`fieldprop.numerics.zero_point.STEPS`: 4 n geometries for n
modes. Each displaced geometry is an ordinary job (its field points keyed,
stored and reused as any job's, computed by the same stage engine on the
same executor as the minimum's) and has one zero-field nuclear gradient (a
task of its own, stored under :func:`gradient_key`) for the cubic force
constants. The correction itself is :mod:`fieldprop.numerics.zero_point`'s.
It may import every engine module but the run and screening entrances.
"""

from __future__ import annotations

import dataclasses
import logging
import time
from dataclasses import dataclass

import numpy as np

from fieldprop import errors
from fieldprop.engine.analyse import RunResult, log_counts
from fieldprop.engine.prepare import Prepared, prepare
from fieldprop.engine.stages import JobWork, compute_jobs, reference_first
from fieldprop.inputs.job import Atom, Job
from fieldprop.inputs.molecule import build_molecule
from fieldprop.numerics import zero_point as zp
from fieldprop.numerics.extrapolate import ComponentStatus
from fieldprop.numerics.tensors import Invariant, TensorResult, from_arrays, invariants
from fieldprop.points.keys import digest, short_id

logger = logging.getLogger(__name__)


@dataclass(frozen=True, eq=False)
class Geometry:
    """One displaced geometry: mode (from 0), step (dimensionless), sign; a
    geometry that is the image of another (``source``, its index) under an
    operation of the minimum's point group (``operation``, 3 x 3 about the
    centre, and ``permutation``: atom A goes to permutation[A]) is not
    computed: its tensors and gradient are the source's, turned."""

    mode: int
    step: float
    sign: int
    job: Job
    source: int | None = None
    operation: np.ndarray | None = None
    permutation: tuple[int, ...] | None = None

    @property
    def label(self) -> str:
        return f"mode {self.mode + 1} at {self.sign * self.step:+g}"


@dataclass(frozen=True)
class ZeroPoint:
    """A result's zero-point part: ``correction`` (the tensors' correction,
    in the layout of the electronic ones), ``total`` (electronic, plus the
    nuclear relaxation where computed, plus the correction) and its
    invariants, the modes, each mode's contribution to each invariant, the
    cubic sums, the counts of geometries and points."""

    correction: dict[str, TensorResult]
    total: dict[str, TensorResult]
    total_invariants: tuple[Invariant, ...]
    modes: zp.Modes
    masses_u: tuple[float, ...]
    contributions: tuple[dict, ...]
    cubic: zp.CubicSums
    geometries: int
    computed: int
    reused: int
    #: Of ``geometries``, the images of others by symmetry (not computed).
    images: int
    #: The correction before the components zero by symmetry were set to zero.
    raw: dict
    warnings: tuple[str, ...] = ()


def modes_of(job: Job, symmetry=None) -> zp.Modes:
    """The harmonic modes of the job's zero-field frame (job.relaxation), its
    Hessian averaged over the minimum's point group ``symmetry`` (finite
    groups) first."""
    from fieldprop.numerics.relaxation import Frame

    doc = job.relaxation
    hessian = doc["hessian_cartesian"]
    if symmetry is not None and symmetry.kind == "finite":
        hessian = zp.symmetrised_hessian(hessian, doc["coords_bohr"],
                                         [a.charge for a in job.molecule.atoms],
                                         symmetry.operations, symmetry.centre)
    return zp.Modes.from_frame(Frame.build(doc["coords_bohr"], doc["masses_u"], hessian))


def geometries(job: Job, modes: zp.Modes, symmetry=None, masses=None) -> list[Geometry]:
    """The displaced geometries, mode by mode, each step +s then -s; where
    an operation of ``symmetry`` (the minimum's point group as its points use
    it: engine.prepare.symmetry_decision) turns a mode into its opposite, the
    -s geometry is the +s one's image."""
    x0 = np.asarray([a.coords_bohr for a in job.molecule.atoms], dtype=float)
    # Every geometry's dipole about the minimum's origin: an ion's dipole
    # depends on it, and a centre moving with the nuclei would add its motion.
    origin = tuple(float(v) for v in build_molecule(job.molecule,
                                                    job.response.origin).origin_bohr)
    # An operation must map each nucleus onto one of the same charge and mass
    # (a single deuterium breaks the vibrations' symmetry, not the electrons').
    labels = [(a.charge, None if masses is None else round(float(m), 6))
              for a, m in zip(job.molecule.atoms, masses if masses is not None
                              else [None] * len(job.molecule.atoms))]
    out = []
    for a in range(len(modes.omega_au)):
        mirror = _mirror(symmetry, x0, labels, modes.displacements[a])
        for step in zp.STEPS:
            for sign in (1, -1):
                coords = x0 + sign * step * modes.displacements[a]
                label = f"mode {a + 1} at {sign * step:+g}"
                displaced = displaced_job(job, coords, label, origin)
                if sign < 0 and mirror is not None:
                    out.append(Geometry(a, step, sign, displaced, len(out) - 1, *mirror))
                else:
                    out.append(Geometry(a, step, sign, displaced))
    return out


#: Atoms and displacements match under an operation within this (bohr, and
#: relative to the displacement's size).
MIRROR_TOLERANCE = 1e-6


def _mirror(symmetry, x0, labels, displacement):
    """(R, permutation) of an operation of ``symmetry`` (a finite group) that
    maps the minimum onto itself (each nucleus onto one of the same label)
    and the mode's displacement onto its opposite, or None."""
    if symmetry is None or symmetry.kind != "finite":
        return None
    d = np.asarray(displacement, dtype=float)
    size = max(np.abs(d).max(), 1e-300)
    for op in symmetry.operations[1:]:
        perm = zp.atom_permutation(op, x0, labels, symmetry.centre, MIRROR_TOLERANCE)
        if perm is None:
            continue
        turned = d @ op.T
        if all(np.abs(turned[i] + d[perm[i]]).max() <= MIRROR_TOLERANCE * size
               for i in range(len(x0))):
            return np.asarray(op, dtype=float), tuple(perm)
    return None


class _Image:
    """The tensors of a geometry that is another's image (Geometry.source):
    what with_zero_point reads of a RunResult."""

    def __init__(self, source: RunResult, op: np.ndarray):
        from types import SimpleNamespace

        from fieldprop.numerics.tensors import turned

        self.tensors = {name: SimpleNamespace(value_au=turned(t.value_au, op),
                                              error_au=turned(t.error_au, op, magnitudes=True))
                        for name, t in source.tensors.items()}
        self.unstable_components = source.unstable_components
        self.missing_components = source.missing_components


def _image_gradient(document: dict, g: Geometry) -> dict:
    """The source's gradient document turned onto its image: atom A's
    gradient R g_A goes to atom permutation[A]."""
    source = np.asarray(document["gradient_au"], dtype=float)
    out = np.zeros_like(source)
    for a, b in enumerate(g.permutation):
        out[b] = g.operation @ source[a]
    return {**document, "gradient_au": out.tolist()}


def displaced_job(job: Job, coords_bohr, label: str, origin_bohr=None) -> Job:
    """``job`` at other nuclei (clamped, no zero-point average of its own),
    its origin ``origin_bohr`` where given."""
    atoms = tuple(Atom(a.symbol, tuple(float(v) for v in xyz))
                  for a, xyz in zip(job.molecule.atoms, coords_bohr))
    molecule = dataclasses.replace(job.molecule, atoms=atoms,
                                   source=f"{job.molecule.source}, zero-point {label}")
    response = dataclasses.replace(job.response, zero_point=False, nuclear_relaxation=False,
                                   **({} if origin_bohr is None else {"origin": origin_bohr}))
    return dataclasses.replace(job, molecule=molecule, response=response, relaxation=None)


def gradient_key(prepared: Prepared) -> str:
    """The store key of a geometry's zero-field energy and nuclear gradient."""
    return digest({"kind": "fieldprop-zero-point-gradient", "model": prepared.model_key})


@dataclass
class ZeroPointWork:
    """The displaced geometries of a job (``geometries``: all of them), and
    the computed ones (``computed``: their indices) prepared, with their
    JobWorks."""

    modes: zp.Modes
    geometries: list[Geometry]
    computed: list[int]
    prepared: list[Prepared]
    works: list[JobWork]

    @property
    def images(self) -> int:
        return len(self.geometries) - len(self.computed)


def displaced_works(prepared: Prepared, store, retry_failed: bool = False) -> ZeroPointWork:
    """The displaced geometries of ``prepared`` and the work of those
    computed, with the records ``store`` holds."""
    modes = modes_of(prepared.job, prepared.symmetry)
    geoms = geometries(prepared.job, modes, prepared.symmetry,
                       prepared.job.relaxation["masses_u"])
    computed = [i for i, g in enumerate(geoms) if g.source is None]
    preps = [prepare(geoms[i].job, facts=prepared.facts) for i in computed]
    works = []
    for i, p in zip(computed, preps):
        rows = store.get_points(t.key for t in p.all_tasks())
        works.append(JobWork.at_hand(p, rows, retry_failed, label=geoms[i].label,
                                     check_geometry=False))
    return ZeroPointWork(modes, geoms, computed, preps, works)


def _all_geometries(zpw: ZeroPointWork, computed_results: list) -> list:
    """One entry per geometry from the computed ones' (results or gradient
    documents, in the order of ``zpw.computed``): images turned."""
    out: list = [None] * len(zpw.geometries)
    for i, r in zip(zpw.computed, computed_results):
        out[i] = r
    for i, g in enumerate(zpw.geometries):
        if g.source is not None:
            out[i] = (_image_gradient(out[g.source], g) if isinstance(out[g.source], dict)
                      else _Image(out[g.source], g.operation))
    return out


def gradients(prepared: Prepared, work: ZeroPointWork, store, executor=None) -> list[dict]:
    """The zero-field energy and gradient of the minimum and of every displaced
    geometry (that order): from ``store``, or computed on ``executor`` and
    stored (None: IncompleteError for any not stored)."""
    everyone = [prepared] + work.prepared
    labels = ["the minimum"] + [work.geometries[i].label for i in work.computed]
    docs: list = [store.get_geometry(gradient_key(p)) if store is not None else None
                  for p in everyone]
    absent = [i for i, d in enumerate(docs) if d is None]
    if absent and executor is None:
        raise errors.IncompleteError(
            f"{prepared.job.path}: [response] zero_point: {len(absent)} of the "
            f"{len(everyone)} zero-field gradients are not in "
            f"{store.label if store is not None else 'any store'} (first: {labels[absent[0]]},"
            f" key {short_id(gradient_key(everyone[absent[0]]))}); fieldprop run computes them")
    if absent:
        from fieldprop.backend.tasks import gradient_task

        logger.info("zero-point average: %d zero-field nuclear gradient%s on %s", len(absent),
                    "" if len(absent) == 1 else "s", executor.label)
        pending = {}
        for i in absent:
            p = everyone[i]
            pending[executor.submit(gradient_task, p.molecule, p.job.model, p.job.scf,
                                    f"zero-point average, {labels[i]}", executor.threads)] = i
        try:
            while pending:
                for future in executor.first_done(pending):
                    i = pending.pop(future)
                    document, failure = future.result()
                    if failure is not None:
                        kind = getattr(errors, failure[1], errors.BackendError)
                        raise kind(f"{prepared.job.path}: {failure[0]}")
                    store.put_geometry(gradient_key(everyone[i]), document)
                    docs[i] = document
        except BaseException:
            executor.close(abort=True, pending=list(pending))
            raise
    return [docs[0]] + _all_geometries(work, docs[1:])


def run_zero_point(work: JobWork, store, executor, progress=None) -> RunResult:
    """The job's clamped points and every displaced geometry's, through one
    stage engine run, then the electronic result with its zero-point part
    (:func:`with_zero_point`). A failed or unstable displaced geometry is an
    error (the points computed are stored)."""
    start = time.perf_counter()
    prepared = work.prepared
    zpw = displaced_works(prepared, store, work.retry_failed)
    todo = sum(len(w.todo()) for w in zpw.works)
    freqs = zpw.modes.frequencies_cm()
    logger.info("%s: zero-point average: %d mode%s (%.0f to %.0f cm^-1), %d displaced "
                "geometries (steps %s of the dimensionless normal coordinates; %d of them "
                "images of others by symmetry), %d of their field points to compute now (more "
                "may follow: adaptive window)",
                prepared.job.path, len(freqs), "" if len(freqs) == 1 else "s", freqs.min(),
                freqs.max(), len(zpw.geometries), " and ".join(f"+-{s:g}" for s in zp.STEPS),
                zpw.images, todo)
    grads = gradients(prepared, zpw, store, executor)
    # The minimum's reference first: its density starts every displaced
    # geometry's zero-field SCF (each is the minimum moved by a fraction of
    # its zero-point amplitude).
    reference_first(work, store, executor, progress)
    if work.reference is not None:
        for w in zpw.works:
            w.guess = work.reference.density
    compute_jobs([work] + zpw.works, store, executor, progress)
    if progress is not None:
        progress.close()
    log_counts(prepared, work.counts(), store.label)
    if work.failure is not None:
        raise work.failure
    result = work.result(store.label, time.perf_counter() - start)
    displaced = []
    for i, w in zip(zpw.computed, zpw.works):
        if w.failure is not None:
            raise type(w.failure)(f"zero-point average, {zpw.geometries[i].label}: "
                                  f"{w.failure}")
        w.reference = None  # displaced on purpose: no "not a minimum" warning
        displaced.append(w.result(store.label, 0.0))
    computed = sum(w.counts().computed for w in zpw.works)
    reused = sum(w.counts().reused for w in zpw.works)
    return with_zero_point(result, zpw, _all_geometries(zpw, displaced), grads, computed,
                           reused)


def with_zero_point(result: RunResult, zpw: ZeroPointWork, displaced: list[RunResult],
                    grads: list[dict], computed: int, reused: int) -> RunResult:
    """``result`` with its zero-point part (see :class:`ZeroPoint`)."""
    job = result.job
    modes = zpw.modes
    n = len(modes.omega_au)
    for g, r in zip(zpw.geometries, displaced):
        bad = r.unstable_components + r.missing_components
        if bad:
            raise errors.UnstableResultError(
                f"{job.path}: zero-point average, {g.label}: no number for "
                f"{'; '.join(bad[:3])}: the correction cannot be formed")
    where = {(g.mode, g.step, g.sign): i for i, g in enumerate(zpw.geometries)}

    def at(a, sign):
        return [where[a, s, sign] for s in zp.STEPS]

    mode_gradients = [modes.gradient_along(d["gradient_au"]) for d in grads]
    cubic = zp.cubic_sums(mode_gradients[0],
                          [[mode_gradients[1 + i] for i in at(b, 1)] for b in range(n)],
                          [[mode_gradients[1 + i] for i in at(b, -1)] for b in range(n)])
    correction, raw, per_mode = {}, {}, {}
    for name, t in result.tensors.items():
        def values(sign, what):
            return [[getattr(displaced[i].tensors[name], what) for i in at(a, sign)]
                    for a in range(n)]
        d = zp.central_differences(t.value_au, t.error_au, values(1, "value_au"),
                                   values(1, "error_au"), values(-1, "value_au"),
                                   values(-1, "error_au"))
        part = zp.correction(modes.omega_au, d, cubic)
        raw[name] = part
        correction[name] = from_arrays(t, part.value, part.error, ComponentStatus.OK)
        per_mode[name] = part
    base = result.relaxation.total.tensors if result.relaxation is not None else result.tensors
    total = {name: from_arrays(base[name], base[name].value_au + c.value_au,
                               base[name].error_au + c.error_au, ComponentStatus.OK)
             for name, c in correction.items()}
    clamped = {inv.name: inv.value_au for inv in result.invariants}
    contributions = []
    for a in range(n):
        shifted = {name: from_arrays(t, t.value_au + per_mode[name].per_mode[a],
                                     t.error_au + per_mode[name].per_mode_error[a])
                   for name, t in result.tensors.items()}
        contributions.append({inv.name: (None if inv.value_au is None
                                         or clamped.get(inv.name) is None
                                         else inv.value_au - clamped[inv.name])
                              for inv in invariants(shifted)})
    freqs = modes.frequencies_cm()
    warnings = tuple(
        f"zero-point average: mode {a + 1} is soft ({freqs[a]:.0f} cm^-1, below "
        f"{zp.SOFT_MODE_CM:g}): its large amplitude makes the first-order correction a rough "
        "guide" for a in range(n) if freqs[a] < zp.SOFT_MODE_CM)
    part = ZeroPoint(correction, total, tuple(invariants(total)), modes,
                     tuple(job.relaxation["masses_u"]), tuple(contributions), cubic,
                     len(zpw.geometries), computed, reused, zpw.images, raw, warnings)
    return dataclasses.replace(result, zero_point=part, warnings=result.warnings + warnings)


def counts_line(part: ZeroPoint) -> str:
    return (f"{part.geometries} displaced geometries, {part.computed} field points computed, "
            f"{part.reused} reused")



def collect_zero_point(result: RunResult, prepared: Prepared, store, lines=None) -> RunResult:
    """``fieldprop collect``'s zero-point part: every displaced geometry's
    points and gradients from ``store`` (and point ``lines``), no PySCF work;
    IncompleteError naming the first geometry that is not complete."""
    from fieldprop.engine.run import collect

    zpw = displaced_works(prepared, store)
    grads = gradients(prepared, zpw, store, None)
    displaced = []
    for i in zpw.computed:
        g = zpw.geometries[i]
        try:
            displaced.append(collect(g.job, store, lines=lines, check_geometry=False))
        except errors.FieldpropError as exc:
            raise type(exc)(f"zero-point average, {g.label}: {exc}") from None
    reused = sum(len(r.computed_records) for r in displaced)
    return with_zero_point(result, zpw, _all_geometries(zpw, displaced), grads, 0, reused)
