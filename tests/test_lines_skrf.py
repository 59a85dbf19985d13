"""labkit.core.lines against scikit-rf (PyPI ``scikit-rf``) used as an independent ABCD calculator.

scikit-rf builds its networks as S parameters and cascades them with its own connection algebra
(``**``); its ``.a`` and ``.y`` convert back. Agreement to 1e-9 relative or better is asked for.
"""

from __future__ import annotations

import numpy as np
import pytest

from labkit.core.lines import SectionValues, TwoPort, branch_admittance, branch_two_port, path_two_port

skrf = pytest.importorskip("skrf")
from skrf.media import DefinedGammaZ0  # noqa: E402

FREQS_HZ = np.array([50.0, 60.0, 180.0, 300.0, 420.0, 3000.0])  # fundamentals and harmonics of a bench
OMEGA = 2 * np.pi * FREQS_HZ
RTOL = 1e-9


def frequency() -> skrf.Frequency:
    return skrf.Frequency.from_f(FREQS_HZ, unit="hz")


def skrf_pi_section(media: DefinedGammaZ0, r: float, l_h: float, c_f: float, g_s: float = 0.0) -> skrf.Network:
    """A nominal pi section built from scikit-rf's own lumped elements: C/2 || G/2, R, L, C/2 || G/2."""
    half = media.shunt_capacitor(c_f / 2)
    if g_s:
        half = half ** media.shunt_resistor(2 / g_s)
    return half ** media.resistor(r) ** media.inductor(l_h) ** half


def test_exact_line_matches_scikit_rf_defined_gamma_z0():
    # scikit-rf DefinedGammaZ0(frequency, gamma, z0).line(d, "m"): gamma per metre, z0 the line's Zc.
    # Saadat Ex 5.2 per-km data (field-reference 2.2) given per metre, plus some shunt conductance.
    r, l_h, c_f, g_s = 0.036e-3, 0.8e-6, 0.0112e-9, 3e-12  # per metre
    z = r + 1j * OMEGA * l_h
    y = g_s + 1j * OMEGA * c_f
    gamma, zc = np.sqrt(z * y), np.sqrt(z / y)
    media = DefinedGammaZ0(frequency(), gamma=gamma, z0=zc, z0_port=50.0)
    for length_m in (1e3, 130e3, 400e3):
        reference = media.line(length_m, "m").a
        ours = TwoPort.exact_line(z, y, length_m).abcd
        np.testing.assert_allclose(ours, reference, rtol=RTOL, atol=RTOL * np.abs(reference).max())


def test_cascade_of_pi_sections_matches_scikit_rf_cascade():
    # scikit-rf Network cascade (**) of lumped-element pi sections vs path_two_port (demo bench S1 and S7 values).
    media = DefinedGammaZ0(frequency(), z0=50.0)
    sections = [SectionValues(r=0.6, l=6e-3, c=4e-6), SectionValues(r=0.6, l=6e-3, c=4e-6, g=1e-5),
                SectionValues(r=1.0, l=8e-3, c=2e-6)]
    reference = skrf_pi_section(media, 0.6, 6e-3, 4e-6) ** skrf_pi_section(media, 0.6, 6e-3, 4e-6, 1e-5) \
        ** skrf_pi_section(media, 1.0, 8e-3, 2e-6)
    ours = path_two_port(sections, OMEGA)
    np.testing.assert_allclose(ours.abcd, reference.a, rtol=RTOL, atol=RTOL * np.abs(reference.a).max())
    # N identical sections: TwoPort.power against scikit-rf's repeated cascade.
    chain = skrf_pi_section(media, 0.6, 6e-3, 4e-6)
    for _ in range(5):
        chain = chain ** skrf_pi_section(media, 0.6, 6e-3, 4e-6)
    ours6 = sections[0].two_port(OMEGA).power(6)
    np.testing.assert_allclose(ours6.abcd, chain.a, rtol=RTOL, atol=RTOL * np.abs(chain.a).max())
    # The nodal admittance matrix and its signs: scikit-rf's Y parameters (currents into both ports).
    np.testing.assert_allclose(ours.to_y(), reference.y, rtol=RTOL, atol=1e-9 * np.abs(reference.y).max())


def test_parallel_paths_match_scikit_rf_admittance_sum():
    # Two paths in parallel: scikit-rf Y parameters of each path added, converted with skrf's own y2s and s2a.
    media = DefinedGammaZ0(frequency(), z0=50.0)
    path_a = [SectionValues(r=0.6, l=6e-3, c=4e-6), SectionValues(r=0.6, l=6e-3, c=4e-6)]
    path_b = [SectionValues(r=1.0, l=8e-3, c=2e-6)]
    net_a = skrf_pi_section(media, 0.6, 6e-3, 4e-6) ** skrf_pi_section(media, 0.6, 6e-3, 4e-6)
    net_b = skrf_pi_section(media, 1.0, 8e-3, 2e-6)
    y_sum = net_a.y + net_b.y
    y_ours = branch_admittance([path_a, path_b], OMEGA)
    np.testing.assert_allclose(y_ours, y_sum, rtol=RTOL, atol=1e-9 * np.abs(y_sum).max())
    a_ref = skrf.network.s2a(skrf.network.y2s(y_sum, z0=50.0))
    np.testing.assert_allclose(branch_two_port([path_a, path_b], OMEGA).abcd, a_ref, rtol=RTOL,
                               atol=1e-9 * np.abs(a_ref).max())
