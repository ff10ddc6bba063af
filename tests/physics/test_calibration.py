"""Error bars are honest and useful: coverage and sharpness on a validation set.

Eight molecule/model cases (HF and DFT, closed and open shell, see
calibration.VALIDATION_SET), energy route (mu, alpha, beta) and dipole route
(alpha, beta), against PySCF's analytic dipole, an independent CPHF/CPKS alpha and
beta from field derivatives of the analytic alpha. The figures are quoted in
docs/trust.md. Per case 19 energy-route components (mu 3, alpha 6, beta 10) and 16
dipole-route ones (alpha 6, beta 10: each unique component once, the index
symmetry assumed as by default): 280 for the eight cases, 70 for the two larger.
"""

import pytest

from calibration import LARGER_SET, collect, figures


@pytest.mark.slow
def test_error_bars_cover_95_percent_and_are_within_30x(tmp_path):
    rows = collect(tmp_path, workers=2)
    coverage, sharpness, n_components, n_resolved = figures(rows)
    print(f"coverage {coverage:.3f} of {n_components} components; median bar/true error "
          f"{sharpness:.1f} over {n_resolved} resolvable ones")
    # Measured in one run (2 workers): coverage 100 % of 280, median 11.3 over 163.
    assert n_components >= 270 and n_resolved >= 100
    assert coverage >= 0.95
    assert sharpness <= 30.0


@pytest.mark.slow
def test_error_bars_hold_on_larger_push_pull_molecules(tmp_path):
    """3-aminopropenal and 4-nitroaniline (10 and 16 atoms, HF/6-31G, h0 = 0.001
    au; calibration.LARGER_SET), both routes. Before the energy's rounding was
    scaled by its terms rather than |E|, energy-route alpha was covered for 1
    of 6 components of 3-aminopropenal (bars 0.5x the true errors)."""
    rows = collect(tmp_path, LARGER_SET, workers=2)
    coverage, sharpness, n_components, n_resolved = figures(rows)
    print(f"coverage {coverage:.3f} of {n_components} components; median bar/true error "
          f"{sharpness:.1f} over {n_resolved} resolvable ones")
    # Measured in one run (2 workers): coverage 100 % of 70, median 9.4 over 39.
    assert n_components >= 68 and n_resolved >= 20
    assert coverage >= 0.95
    assert sharpness <= 30.0


@pytest.mark.slow
def test_the_adaptive_window_keeps_the_coverage(tmp_path):
    """The validation set on the automatic ladder with the adaptive window (no
    field_au): the same coverage as the fixed ladders above, from fewer points
    than the whole ladder. Measured in one run (2 workers): coverage 99.3 % of
    280 components, median bar/true error 27.4 over 141 resolvable ones, 698
    points (before the dipole route assumed the index symmetry: 99.5 % of 368,
    median 18.9 at first and 23 later, 801 points against 1350 for the whole
    ladder, whose coverage was 99.5 % too, median 7.3; every adaptive component
    within the summed error bars of the whole ladder's)."""
    points = []
    rows = collect(tmp_path, workers=2, window="adaptive", points=points)
    coverage, sharpness, n_components, n_resolved = figures(rows)
    print(f"coverage {coverage:.3f} of {n_components} components; median bar/true error "
          f"{sharpness:.1f} over {n_resolved} resolvable ones; {sum(points)} points")
    assert n_components >= 270 and n_resolved >= 100
    assert coverage >= 0.95
    assert sharpness <= 30.0
    assert sum(points) < 1000  # the whole ladder: 1350
