"""The full-scale line a bench branch stands for (per-unit scaling round trip of field-reference §2.1)."""

from __future__ import annotations

import re
from pathlib import Path

import pytest

from labkit.core.lines import branch_full_scale_note
from labkit.files.loader import load_bench

ROOT = Path(__file__).resolve().parent.parent / "session_templates"


@pytest.mark.parametrize(("position", "km"), [("single", 65.0), ("series", 130.0), ("parallel", 65.0)])
def test_branch_of_full_scale_sections_reports_its_length(position: str, km: float) -> None:
    # S5 and S6 are each 65 km of the line given per length in the demo bench (exact pi); scaling back by the
    # bases of [line_scaling] must recover the length the per-length inductance implies (one circuit).
    bench = load_bench(ROOT / "demo-bench.toml").bench
    note = branch_full_scale_note(bench, "L23", position)
    found = float(re.search(r"([0-9.]+) km", note).group(1))
    assert found == pytest.approx(km, rel=1e-9)
    assert ("2 parallel circuits" in note) == (position == "parallel")


def test_per_unit_of_a_branch_matches_the_full_scale_line() -> None:
    # Saadat Ex. 5.2 per-length data (field-reference §2.2, [IN]) over 65 km, exact model: Z' = Zc sinh(gl),
    # computed here independently and put in per unit on the demo's full-scale bases (199.186 kV, 90 MVA)
    import cmath

    bench = load_bench(ROOT / "demo-bench.toml").bench
    w = 2 * cmath.pi * 60
    z, y, length = 0.036e-3 + 1j * w * 0.8e-6, 1j * w * 0.0112e-9, 65e3
    zc, gl = cmath.sqrt(z / y), cmath.sqrt(z * y) * length
    z_pu = zc * cmath.sinh(gl) / (199.186e3**2 / 90e6)
    note = branch_full_scale_note(bench, "L23", "single")
    found = complex(re.search(r"Z = \(?([-+0-9.e]+[-+][0-9.e]+j)\)? pu", note).group(1))
    assert found == pytest.approx(z_pu, rel=1e-3)  # 4 significant digits printed
