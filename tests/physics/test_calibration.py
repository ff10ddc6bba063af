"""Error bars are honest and useful: coverage and sharpness on a validation set.

Eight molecule/model cases (HF and DFT, closed and open shell, see
calibration.VALIDATION_SET), energy route (mu, alpha, beta) and dipole route
(alpha, beta), against PySCF's analytic dipole, an independent CPHF/CPKS alpha and
beta from field derivatives of the analytic alpha. The figures are quoted in the
README.
"""

import pytest

from calibration import collect, figures


@pytest.mark.slow
def test_error_bars_cover_95_percent_and_are_within_30x(tmp_path):
    rows = collect(tmp_path)
    coverage, sharpness, n_components, n_resolved = figures(rows)
    print(f"coverage {coverage:.3f} of {n_components} components; median bar/true error "
          f"{sharpness:.1f} over {n_resolved} resolvable ones")
    assert n_components >= 300 and n_resolved >= 100
    assert coverage >= 0.95
    assert sharpness <= 30.0
