"""A conformer ensemble's document (``<name>.ensemble.json`` of a screen):
the conformers' energies, weights and result files, and the
Boltzmann-weighted invariants with their spread (fieldprop.numerics.ensemble).
Built from the conformers' result documents alone."""

from __future__ import annotations

from fieldprop.numerics import ensemble

ENSEMBLE_SCHEMA = "fieldprop-ensemble-1"


#: Invariants averaged as intensities (numerics.ensemble.incoherent).
INCOHERENT = ("beta_hrs", "beta_hrs_zzz", "beta_hrs_xzz")
RATIO = "beta_hrs_depolarisation_ratio"


def ensemble_document(name: str, conformers: list[tuple[int, float | None, str, dict]],
                      temperature_k: float, rmsd=None) -> dict:
    """``conformers``: (number, force-field energy above the lowest in
    kcal/mol, result file name, result document) of every conformer, all
    computed. Invariants present in every conformer with a number are
    weighted; others have none (and say why). ``rmsd``: how two optimised
    structures are compared (numerics.ensemble.duplicates)."""
    from scipy import constants

    energies = [doc["energy_au"] for _, _, _, doc in conformers]
    coords = [[a["coords_bohr"] for a in doc["geometry_computed_bohr"]]
              for _, _, _, doc in conformers]
    same = ensemble.duplicates(energies, coords, rmsd)
    distinct = [i for i, s in enumerate(same) if s is None]
    weights = ensemble.boltzmann_weights([energies[i] for i in distinct], temperature_k)
    weight_of = dict(zip(distinct, weights))
    kcal = constants.physical_constants["Hartree energy"][0] * constants.N_A / 4184.0
    lowest = min(energies)
    first = conformers[distinct[0]][3]
    invariants = {}
    for key in first["invariants"]:
        entries = [conformers[i][3]["invariants"].get(key) or {} for i in distinct]
        values = [e.get("value") for e in entries]
        errors = [e.get("error") for e in entries]
        if any(v is None for v in values) or any(e is None for e in errors):
            invariants[key] = {"value": None, "error": None,
                               "reason": "a conformer has no number for it"}
            continue
        if key == RATIO:
            parts = [[(conformers[i][3]["invariants"].get(k) or {}).get(x) for i in distinct]
                     for k in ("beta_hrs_zzz", "beta_hrs_xzz") for x in ("value", "error")]
            if any(v is None for p in parts for v in p):
                invariants[key] = {"value": None, "error": None,
                                   "reason": "a conformer has no hyper-Rayleigh intensities"}
                continue
            value, error = ensemble.intensity_ratio(*parts, weights)
            invariants[key] = {"value": value, "error": error, "min": min(values),
                               "max": max(values)}
            continue
        average = ensemble.incoherent if key in INCOHERENT else ensemble.weighted
        value, error, low, high = average(values, errors, weights)
        invariants[key] = {"value": value, "error": error, "min": low, "max": high}
    return {
        "schema": ENSEMBLE_SCHEMA,
        "name": name,
        "formula": first.get("formula"),
        "job": {"model": first["job"].get("model")},
        "convention": first.get("convention", "taylor"),
        "units": first.get("units", "au"),
        "temperature_k": temperature_k,
        "method": "Boltzmann weights from the model's zero-field energies at each conformer's "
                  "own optimised minimum; invariants weighted (the tensors' orientations "
                  "differ between conformers: tensors are not averaged), the hyper-Rayleigh "
                  "ones as intensities (sqrt(sum w beta_hrs^2); the depolarisation ratio as "
                  "the mixture's intensity ratio), the others linearly; bars: the "
                  "conformers' numerical bars carried, without the weights' uncertainty",
        "conformers": [{"conformer": number, "result": file, "energy_au": energies[i],
                        "relative_kcal_mol": (energies[i] - lowest) * kcal,
                        "force_field_kcal_mol": ff,
                        "weight": float(weight_of.get(i, 0.0)),
                        "same_minimum_as": (None if same[i] is None
                                            else conformers[same[i]][0])}
                       for i, (number, ff, file, _) in enumerate(conformers)],
        "invariants": invariants,
        "tensors": {},
    }
