"""Richardson (Rutishauser-Romberg) extrapolation over the field ladder.

Pure numerics: plain floats in, a frozen :class:`ComponentEstimate` out.

Error model
-----------
Raw estimates D(h_k), h_k = h0 * a**k, carry a truncation error with even powers
only, D(h) = D + c1 h^2 + c2 h^4 + ..., plus round-off r_k (noise in the energies or
dipoles divided by h_k^n). The table

    D(k, 0) = D(h_k);   D(k, m) = [a^(2m) D(k, m-1) - D(k+1, m-1)] / (a^(2m) - 1)

removes the h^(2m) term at column m (REFERENCES sect. 2). Each entry is a linear
combination sum_j c_j D(h_j) of the raw estimates; its round-off floor is
sum_j |c_j| r_j. Its truncation error is judged from its neighbours: the
"iteration" difference |D(k,m) - D(k,m-1)| and the "field" difference
|D(k,m) - D(k+1,m)|. An entry's error estimate is the larger of the available
differences plus its round-off floor; the entry with the smallest estimate is
chosen. The estimate is not a bound.

Example
-------
>>> est = richardson([1.0 + 0.5 * h**2 for h in (0.01, 0.02)], ratio=2.0,
...                  noise_au=[1e-12, 1e-12])
>>> round(est.value_au, 12), est.chosen_entry
(1.0, (0, 1))
"""

from __future__ import annotations

import enum
import math
from dataclasses import dataclass


class ComponentStatus(enum.Enum):
    """Whether to trust the number, and what its error bar rests on (the words
    users read: README, "Reading the tables")."""

    #: Trusted; the bar is the Richardson table's spread (truncation resolved).
    OK = "ok"
    #: Trusted; the bar is the SCF's noise carried through the stencil, larger
    #: than the table's spread (a tighter SCF, or a larger field, shrinks it).
    NOISE_LIMITED = "ok-at-noise-floor"
    #: Trusted; a zero-field quantity, no derivative taken: the bar is its noise.
    ZERO_FIELD = "ok-zero-field"
    #: Exactly zero: the molecule's point-group symmetry forbids the component.
    SYMMETRY_ZERO = "zero-by-symmetry"
    #: No entry is trustworthy: no number is reported.
    UNSTABLE = "unstable"
    #: Not determined: points it needs are not computed (``collect
    #: --allow-partial``); no number is reported.
    MISSING = "missing"


@dataclass(frozen=True)
class ComponentEstimate:
    """One tensor component from its Richardson table.

    ``table[m][k]`` is D(k, m) (column m has levels - m entries); ``chosen_entry``
    is (k, m) of the reported value; ``error_au`` is the table difference plus the
    round-off floor of that entry: an estimate, not a bound.
    """

    value_au: float
    error_au: float
    chosen_entry: tuple[int, int]
    status: ComponentStatus
    roundoff_au: float
    table: tuple[tuple[float, ...], ...]
    reason: str = ""


def _table(values, ratio):
    """D(k, m) and the coefficients expressing each entry in the raw estimates."""
    n = len(values)
    table = [list(map(float, values))]
    coeffs = [[[1.0 if j == k else 0.0 for j in range(n)] for k in range(n)]]
    for m in range(1, n):
        f = ratio ** (2 * m)
        prev, prevc = table[-1], coeffs[-1]
        table.append([(f * prev[k] - prev[k + 1]) / (f - 1.0) for k in range(n - m)])
        coeffs.append([[(f * prevc[k][j] - prevc[k + 1][j]) / (f - 1.0) for j in range(n)]
                       for k in range(n - m)])
    return table, coeffs


def richardson(values, ratio: float, noise_au) -> ComponentEstimate:
    """Extrapolate raw estimates at h_k = h0 * ratio**k to h -> 0.

    Parameters
    ----------
    values : raw estimates D(h_k), k = 0..K-1 (smallest field first), au.
    ratio : ladder ratio a > 1.
    noise_au : round-off r_k of each raw estimate (noise of the differentiated
        quantity times sum|w| / h_k^n), au.

    Returns
    -------
    ComponentEstimate. With a single value (a plain zero-field quantity such as
    the dipole on the dipole route) the error is the round-off alone.
    """
    values = [float(v) for v in values]
    noise = [float(r) for r in noise_au]
    if len(values) != len(noise) or not values:
        raise ValueError("values and noise_au must be non-empty and of equal length")
    if not all(math.isfinite(v) for v in values):
        return ComponentEstimate(math.nan, math.nan, (0, 0), ComponentStatus.UNSTABLE,
                                 math.nan, (tuple(values),), "non-finite raw estimate")
    table, coeffs = _table(values, ratio)
    frozen = tuple(tuple(col) for col in table)
    if len(values) == 1:
        return ComponentEstimate(values[0], noise[0], (0, 0), ComponentStatus.ZERO_FIELD,
                                 noise[0], frozen)
    best = None
    for m, col in enumerate(table):
        for k, d in enumerate(col):
            diffs = []
            if m >= 1:
                diffs.append(abs(d - table[m - 1][k]))
            if k + 1 < len(col):
                diffs.append(abs(d - col[k + 1]))
            if not diffs:
                continue
            floor = sum(abs(c) * r for c, r in zip(coeffs[m][k], noise))
            spread = max(diffs)
            err = spread + floor
            # Prefer the lower column on a tie: fewer noise-amplifying steps.
            key = (err, m, k)
            if best is None or key < best[0]:
                best = (key, d, err, floor, spread, (k, m))
    _, value, err, floor, spread, entry = best
    status = ComponentStatus.NOISE_LIMITED if floor >= spread else ComponentStatus.OK
    return ComponentEstimate(value, err, entry, status, floor, frozen)


def mark_unstable(est: ComponentEstimate, reason: str) -> ComponentEstimate:
    """The same estimate, flagged unstable with ``reason`` (no number is reported)."""
    return ComponentEstimate(est.value_au, est.error_au, est.chosen_entry,
                             ComponentStatus.UNSTABLE, est.roundoff_au, est.table, reason)
