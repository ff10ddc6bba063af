"""Optical-frequency estimates ([response] optical_wavelengths_nm): the
model's excited states at zero field (one backend task, stored under
:func:`excitations_key`), the dominant state by
:data:`fieldprop.numerics.optical.RULE`, and the two-state estimates of the
electronic (nuclei clamped) beta's invariants at each wavelength. The
numbers are :mod:`fieldprop.numerics.optical`'s. It may import the analysis,
the numerics and the points room; the backend lazily.
"""

from __future__ import annotations

import dataclasses
import logging
from dataclasses import dataclass

from fieldprop import errors
from fieldprop.engine.analyse import RunResult
from fieldprop.engine.prepare import Prepared
from fieldprop.numerics import optical
from fieldprop.numerics.tensors import RATIOS
from fieldprop.points.keys import digest, short_id

logger = logging.getLogger(__name__)


@dataclass(frozen=True)
class OpticalEstimates:
    """The excited state used, and one entry per wavelength and process:
    {"wavelength_nm", "photon_energy_ev", "process", "factor" (None where
    resonant), "resonant", "invariants": {name: (value, error) in au}}."""

    method: str
    state: int  # from 1; 0: none has any oscillator strength
    excitation_energy_au: float | None
    oscillator_strength: float | None
    states: tuple[dict, ...]
    entries: tuple[dict, ...]


def excitations_key(prepared: Prepared) -> str:
    return digest({"kind": "fieldprop-excitations", "model": prepared.model_key,
                   "states": optical.STATES_SEEN})


def excitations(prepared: Prepared, store, executor=None) -> dict:
    """The model's lowest excited states at zero field: from ``store``, or
    computed on ``executor`` and stored (None: IncompleteError if absent)."""
    key = excitations_key(prepared)
    document = store.get_geometry(key) if store is not None else None
    if document is not None:
        return document
    if executor is None:
        raise errors.IncompleteError(
            f"{prepared.job.path}: [response] optical_wavelengths_nm: the excited states (key "
            f"{short_id(key)}) are not in {store.label if store is not None else 'any store'}; "
            "fieldprop run computes them")
    from fieldprop.backend.tasks import excitation_task

    logger.info("%s: the %d lowest excited states at zero field, for the optical-frequency "
                "estimates", prepared.job.path, optical.STATES_SEEN)
    future = executor.submit(excitation_task, prepared.molecule, prepared.job.model,
                             prepared.job.scf, optical.STATES_SEEN,
                             f"{prepared.job.path}: [response] optical_wavelengths_nm",
                             executor.threads)
    document, failure = future.result()
    if failure is not None:
        raise getattr(errors, failure[1], errors.BackendError)(failure[0])
    if store is not None:
        store.put_geometry(key, document)
    return document


def estimates(result: RunResult, document: dict) -> OpticalEstimates:
    """The two-state estimates of ``result``'s electronic beta invariants at
    the job's wavelengths, from the excited states ``document``."""
    states = tuple(document["states"])
    index = optical.dominant_state([s["oscillator_strength"] for s in states])
    chosen = states[index] if index >= 0 else None
    excitation = chosen["energy_au"] if chosen is not None else None
    betas = [inv for inv in result.invariants
             if inv.name.startswith("beta_") and inv.name not in RATIOS]
    entries = []
    for wavelength in result.job.response.optical_wavelengths_nm:
        omega = optical.photon_energy_au(wavelength)
        for process in optical.PROCESSES:
            entry = {"wavelength_nm": wavelength,
                     "photon_energy_ev": optical.photon_energy_ev(wavelength),
                     "process": process, "factor": None, "resonant": False, "invariants": {}}
            if excitation is None:
                entry["reason"] = ("no excited state with oscillator strength among the "
                                   f"{optical.STATES_SEEN} lowest")
            elif optical.resonant(process, omega, excitation):
                entry["resonant"] = True
                entry["reason"] = (f"{'2' if process == 'second-harmonic' else ''}hbar omega "
                                   f"within {optical.RESONANCE_MARGIN_EV:g} eV of the "
                                   "excitation, or above it: resonant, no number")
            else:
                factor = optical.dispersion_factor(process, omega, excitation)
                entry["factor"] = factor
                entry["invariants"] = {
                    inv.name: (None, None) if inv.value_au is None
                    else (inv.value_au * factor, inv.error_au * factor) for inv in betas}
            entries.append(entry)
    return OpticalEstimates(document["method"], index + 1, excitation,
                            chosen["oscillator_strength"] if chosen is not None else None,
                            states, tuple(entries))


def with_optical(result: RunResult, prepared: Prepared, store, executor=None) -> RunResult:
    """``result`` with its optical-frequency estimates (see :func:`estimates`)."""
    part = estimates(result, excitations(prepared, store, executor))
    warnings = ()
    if part.excitation_energy_au is None:
        warnings = (f"{result.job.path}: no excited state with oscillator strength among the "
                    f"{optical.STATES_SEEN} lowest: no optical-frequency estimate",)
    warnings += tuple(
        f"{result.job.path}: the {e['process']} estimate at {e['wavelength_nm']:g} nm is "
        f"resonant (the excitation at {optical.energy_ev(part.excitation_energy_au):.2f} eV, "
        f"margin {optical.RESONANCE_MARGIN_EV:g} eV): no number; a two-state estimate means "
        "nothing there" for e in part.entries if e["resonant"])
    return dataclasses.replace(result, optical=part, warnings=result.warnings + warnings)
