"""The two-state dispersion factors against the two-state sum over states
written here (the Orr-Ward sum with one excited state: B. J. Orr and J. F.
Ward, Mol. Phys. 20, 513 (1971), cited from memory; its six permutation terms
1 / ((w_eg + w_a)(w_eg - w_c)) over the orderings (a, b, c) of (-w_s, w_1,
w_2)), and the resonance rule and the choice of state."""

import itertools

import pytest

from fieldprop.numerics import optical


def _two_state_sum(w_eg, w_s, w1, w2):
    return sum(1.0 / ((w_eg + p[0]) * (w_eg - p[2]))
               for p in itertools.permutations((-w_s, w1, w2)))


@pytest.mark.parametrize("omega", [0.0, 0.01, 0.03, 0.045])
def test_the_factors_are_the_two_state_sum_over_states(omega):
    w_eg = 0.12
    static = _two_state_sum(w_eg, 0.0, 0.0, 0.0)
    assert static == pytest.approx(6 / w_eg ** 2)
    shg = _two_state_sum(w_eg, 2 * omega, omega, omega) / static
    eo = _two_state_sum(w_eg, omega, omega, 0.0) / static
    assert optical.dispersion_factor("second-harmonic", omega, w_eg) == pytest.approx(shg,
                                                                                    rel=1e-12)
    assert optical.dispersion_factor("electro-optic", omega, w_eg) == pytest.approx(eo, rel=1e-12)


def test_photon_energies():
    # The Nd:YAG fundamental, 1064 nm, is 1.165 eV (common practice).
    assert optical.photon_energy_ev(1064.0) == pytest.approx(1.16527, abs=1e-5)
    assert optical.wavelength_nm(optical.photon_energy_au(1907.0)) == pytest.approx(1907.0)


def test_resonance_comes_within_the_margin_for_the_highest_frequency():
    excitation = optical.photon_energy_au(500.0)  # 2.48 eV
    margin = optical.RESONANCE_MARGIN_EV
    # 1064 nm: 2 hbar w = 2.33 eV, within 0.3 eV of 2.48 eV; w alone is far.
    w = optical.photon_energy_au(1064.0)
    assert 2 * optical.photon_energy_ev(1064.0) > 2.48 - margin
    assert optical.resonant("second-harmonic", w, excitation)
    assert not optical.resonant("electro-optic", w, excitation)
    # Beyond the resonance: no number either.
    assert optical.resonant("electro-optic", optical.photon_energy_au(400.0), excitation)


def test_the_rule_takes_the_lowest_intense_state():
    assert optical.dominant_state([0.0, 0.02, 0.9, 0.5, 1.0]) == 2
    assert optical.dominant_state([0.0, 0.0]) == -1
    # Only the first STATES_SEEN states count.
    assert optical.dominant_state([0.1] + [0.0] * (optical.STATES_SEEN - 1) + [5.0]) == 0
