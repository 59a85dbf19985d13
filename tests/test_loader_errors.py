"""Every file in tests/broken/ gives its located message: file, line, field path and a message fragment.

Each broken file is a copy of a valid base in tests/broken/valid/ with one defect (two in the ``two-errors``
files). The expected line is where the defect was written (counted in the file, not taken from the loader's
output); the field path is the key's full path. Unit expectations follow SI usage (BIPM SI Brochure, 9th ed.:
prefix symbols are case-sensitive, m = milli and M = mega; var, VA and W stay apart per IEEE 1459-2010 §3.1).
"""

from __future__ import annotations

from pathlib import Path

import pytest

from labkit.cli.main import main
from labkit.core.bench import Bench
from labkit.core.errors import FileValidationError, Problem
from labkit.files.loader import load_bench, load_template
from tests.conftest import BROKEN, MINI

# (file in tests/broken/, expected line, expected field path, fragment of the message or expected text)
CASES: list[tuple[str, int, str, str]] = [
    ('bench-toml-syntax-unterminated-string.toml', 8, '', 'TOML syntax error'),
    ('bench-unknown-key-top-table.toml', 10, 'bench.nominal_frequncy', 'did you mean "nominal_frequency"'),
    ('bench-unknown-key-inline-table.toml', 12, 'bench.sync_limits.max_slp', 'did you mean "max_slip"'),
    ('bench-unknown-key-array-of-tables.toml', 61, 'switches[1].closing_tme', 'did you mean "closing_time"'),
    ('bench-unknown-key-inline-in-array.toml', 100, 'loads[0].steps[0].descripton', 'did you mean "description"'),
    ('bench-unknown-key-placement-frm.toml', 137, 'sensors[1].placements[1].frm', 'did you mean "from"'),
    ('bench-unknown-key-misspelt-kind.toml', 39, 'sources[1].kinf', 'did you mean "kind"'),
    ('bench-wrong-type-pole-pairs-string.toml', 47, 'sources[1].pole_pairs', 'integer'),
    ('bench-wrong-type-positions-string.toml', 90, 'line_branches[0].positions', 'valid list'),
    ('bench-wrong-type-list-for-table.toml', 12, 'bench.sync_limits', 'valid dictionary'),
    ('bench-missing-required-rated-current.toml', 51, 'switches[0].rated_current', 'missing required field'),
    ('bench-missing-kind-tag.toml', 26, 'sources[0].kind', 'missing "kind"'),
    ('bench-unknown-kind-tag.toml', 112, 'loads[2].kind', 'did you mean "nonlinear"'),
    ('bench-unit-inductance-in-ohm.toml', 43, 'sources[1].l_internal', '"ohm" is not a unit of inductance'),
    ('bench-unit-rad-per-s-for-hz.toml', 10, 'bench.nominal_frequency', 'it is a unit of angular frequency'),
    ('bench-unit-var-for-w-field.toml', 115, 'loads[2].p1', '"var" is not a unit of active power'),
    ('bench-unit-w-for-var-field.toml', 116, 'loads[2].q1', '"W" is not a unit of reactive power'),
    ('bench-unit-va-for-w-field.toml', 115, 'loads[2].p1', '"VA" is not a unit of active power'),
    ('bench-case-slip-MA-for-mA.toml', 62, 'switches[1].rated_current', 'did you mean "850 mA"'),
    ('bench-case-slip-KV.toml', 11, 'bench.nominal_voltage', 'did you mean "kV"'),
    ('bench-case-slip-MH-small-inductance.toml', 74, 'line_sections[1].l', 'did you mean "6 mH"'),
    ('bench-decimal-comma.toml', 81, 'line_sections[2].l', 'write "2.5 mH"'),
    ('bench-bare-number-no-unit.toml', 73, 'line_sections[1].r', 'a number without a unit'),
    ('bench-unknown-unit.toml', 31, 'sources[0].r_internal', 'unknown unit "ohmz"'),
    ('bench-implausible-huge-voltage.toml', 44, 'sources[1].emf_rated', 'outside the plausible range'),
    ('bench-negative-resistance-third-section.toml', 80, 'line_sections[2].r', 'physically absurd value'),
    ('bench-tolerance-300-percent.toml', 84, 'line_sections[2].tolerance', 'physically absurd value 300 %'),
    ('bench-tap-default-above-max.toml', 35, 'sources[0].transformer.tap_default', 'tap_min <= tap_default <= tap_max'),
    ('bench-harmonic-order-one.toml', 118, 'loads[2].harmonics[0].order', 'greater than or equal to 2'),
    ('bench-nominal-frequency-55-hz.toml', 10, 'bench.nominal_frequency', '50 Hz or 60 Hz'),
    ('bench-resistive-load-with-inductance.toml', 100, 'loads[0].steps[0]', 'use kind = "combined"'),
    ('bench-unknown-bus-in-load.toml', 105, 'loads[1].bus', 'no bus "B9"'),
    ('bench-unknown-bus-in-switch.toml', 60, 'switches[1].to_bus', 'did you mean "B1"'),
    ('bench-unknown-section-in-position.toml', 92, 'line_branches[0].positions[1].paths[0][2]', 'no line section "S4"'),
    ('bench-unknown-default-position.toml', 89, 'line_branches[0].default_position', 'did you mean "short"'),
    ('bench-voltage-sensor-at-unknown-bus.toml', 127, 'sensors[0].placements[2].location',
     'a voltage sensor is placed at a bus'),
    ('bench-current-sensor-unknown-element.toml', 138, 'sensors[1].placements[2].location', 'no element "RX"'),
    ('bench-current-sensor-without-direction.toml', 138, 'sensors[1].placements[2]', 'reference direction'),
    ('bench-switch-joins-same-bus.toml', 60, 'switches[1].to_bus', 'two different buses'),
    ('bench-bus-name-repeated.toml', 24, 'buses[3].name', 'name "B2" is already used (at line 21)'),
    ('bench-name-used-twice-across-tables.toml', 111, 'loads[2].id', 'name "S2" is already used'),
    ('bench-invalid-name-characters.toml', 52, 'switches[0].id', 'should match pattern'),
    ('bench-two-errors-units.toml', 66, 'line_sections[0].r', '"mH" is not a unit of resistance'),
    ('bench-two-errors-units.toml', 115, 'loads[2].p1', '"V" is not a unit of active power'),
    ('bench-two-errors-references.toml', 98, 'loads[0].bus', 'no bus "B8"'),
    ('bench-two-errors-references.toml', 105, 'loads[1].bus', 'no bus "B9"'),
    ('cart-unknown-element.toml', 11, 'line_sections.S9', 'no element "S9"'),
    ('cart-unknown-key.toml', 12, 'line_sections.S1.rr', 'did you mean "r"'),
    ('cart-wrong-unit.toml', 13, 'line_sections.S1.l', '"ohm" is not a unit of inductance'),
    ('cart-case-slip-MH.toml', 13, 'line_sections.S1.l', 'did you mean "6.1 mH"'),
    ('cart-negative-value.toml', 19, 'sources.G1.r_internal', 'physically absurd'),
    ('cart-step-value-wrong-unit.toml', 16, 'loads.RB.steps.2.r', '"W" is not a unit of resistance'),
    ('cart-step-out-of-range.toml', 15, 'loads.RB.steps.5', 'a step number 1..2'),
    ('cart-unknown-table.toml', 18, 'sensors', 'unknown table "sensors"'),
    ('cart-other-bench-type.toml', 7, 'cart.bench_type', 'another bench type'),
    ('cart-id-overridden.toml', 19, 'sources.G1.id', 'cannot be overridden'),
    ('cart-missing-measured-on.toml', 4, 'cart.measured_on', 'missing required field'),
    ('cart-measured-on-not-a-date.toml', 8, 'cart.measured_on', 'date'),
    ('cart-unknown-header-key.toml', 9, 'cart.notes', 'did you mean "note"'),
    ('template-toml-duplicate-key.toml', 19, '', 'TOML syntax error'),
    ('template-unknown-key-step.toml', 25, 'steps[1].instuctions', 'did you mean "instructions"'),
    ('template-unknown-key-inline-requires.toml', 10, 'template.requires.sensor', 'did you mean "sensors"'),
    ('template-unknown-key-aot-reading.toml', 37, 'steps[2].readings[0].tolerence', 'did you mean "tolerance"'),
    ('template-unknown-key-inline-reading.toml', 57, 'steps[4].readings[0].unt', 'unknown key'),
    ('template-unknown-step-kind.toml', 29, 'steps[2].kind', 'did you mean "load_step"'),
    ('template-missing-title.toml', 44, 'steps[3].title', 'missing required field'),
    ('template-wrong-type-load-step.toml', 31, 'steps[2].loads.RB', 'integer'),
    ('template-unknown-quantity.toml', 19, 'steps[0].readings[0].quantity', 'did you mean "v_rms"'),
    ('template-reading-unit-wrong-kind.toml', 36, 'steps[2].readings[0].unit', '"A" is not a unit of active power'),
    ('template-reading-unit-case-slip-MA.toml', 42, 'steps[2].readings[1].unit', 'did you mean "mA"'),
    ('template-reading-tolerance-300-percent.toml', 37, 'steps[2].readings[0].tolerance',
     'a tolerance of 300 % is absurd'),
    ('template-tolerance-decimal-comma.toml', 57, 'steps[4].readings[0].tolerance', 'decimal comma'),
    ('template-tolerance-bare-number.toml', 57, 'steps[4].readings[0].tolerance', 'has no unit'),
    ('template-unknown-source.toml', 55, 'steps[4].source', 'no source "G2"'),
    ('template-unknown-switch-in-close.toml', 17, 'steps[0].close[0]', 'no switch "SWX"'),
    ('template-unknown-line-branch.toml', 25, 'steps[1].lines.L13', 'no line branch "L13"'),
    ('template-unknown-position.toml', 25, 'steps[1].lines.L12', 'did you mean "long"'),
    ('template-unknown-load.toml', 31, 'steps[2].loads.RX', 'no load "RX"'),
    ('template-unknown-sensor-in-reading.toml', 43, 'steps[2].readings[1].sensor', 'no sensor "IB"'),
    ('template-requires-unknown-sensor.toml', 10, 'template.requires.sensors[1]', 'no sensor "IC"'),
    ('template-sync-before-start.toml', 48, 'steps[3].source', 'synchronized before any source_start'),
    ('template-reading-where-no-sensor.toml', 19, 'steps[0].readings[0].location',
     'no voltage sensor can be placed at bus "R0"'),
    ('template-current-reading-where-no-sensor.toml', 41, 'steps[2].readings[1].location',
     'no current sensor can be placed at "LB@B2"'),
    ('template-load-step-beyond-bank.toml', 31, 'steps[2].loads.RB', 'load "RB" has no step 3'),
    ('template-tap-outside-range.toml', 18, 'steps[0].tap', "tap outside the transformer's range"),
    ('template-setpoint-outside-range.toml', 49, 'steps[3].frequency_setpoint', "setpoint outside the set's range"),
    ('template-location-grammar.toml', 41, 'steps[2].readings[1].location', 'is not a location'),
    ('template-element-end-at-wrong-bus.toml', 41, 'steps[2].readings[1].location',
     'element "RB" has no end at bus "B1"'),
    ('template-sync-switch-not-at-source.toml', 56, 'steps[4].switch', 'does not connect the bus of source'),
    ('template-duplicate-step-id.toml', 45, 'steps[3].id', 'step id "load" already used'),
    ('template-two-errors.toml', 16, 'steps[0].source', 'no source "REX"'),
    ('template-two-errors.toml', 31, 'steps[2].loads.RB', 'has no step 9'),
]


def load_broken(path: Path, mini_bench: Bench) -> None:
    """Load a broken file the way its kind is loaded: benches alone, carts on the mini bench, templates against it."""
    if path.name.startswith("cart-"):
        load_bench(MINI / "mini-bench.toml", path)
    elif path.name.startswith("template-"):
        load_template(path, mini_bench)
    else:
        load_bench(path)


def problems_of(path: Path, mini_bench: Bench) -> list[Problem]:
    with pytest.raises(FileValidationError) as info:
        load_broken(path, mini_bench)
    return info.value.problems


def test_the_valid_bases_load(mini_bench: Bench) -> None:
    # The bases must be valid, or a broken file would not test its one defect.
    cart = load_bench(MINI / "mini-bench.toml", MINI / "mini-cart.toml").bench
    assert cart.cart is not None
    assert cart.section("S1").r == pytest.approx(0.63)  # the cart's measured value replaced 0.60 ohm
    assert load_template(MINI / "mini-template.toml", mini_bench).template.steps[2].loads == {"RB": 2}


def test_table_covers_every_broken_file() -> None:
    on_disk = {p.name for p in BROKEN.glob("*.toml")}
    in_table = {row[0] for row in CASES}
    assert on_disk == in_table
    assert len(on_disk) >= 40


@pytest.mark.parametrize(("name", "line", "path", "fragment"), CASES, ids=[f"{c[0]}:{c[2]}" for c in CASES])
def test_broken_file_is_located(name: str, line: int, path: str, fragment: str, mini_bench: Bench) -> None:
    file = BROKEN / name
    problems = problems_of(file, mini_bench)
    at_path = [p for p in problems if p.field_path == path]
    assert at_path, f"no problem at {path!r}; got:\n" + "\n".join(map(str, problems))
    hit = [p for p in at_path if fragment in f"{p.message}; {p.expected}; {p.found}"]
    assert hit, f"no problem at {path!r} mentions {fragment!r}; got:\n" + "\n".join(map(str, at_path))
    assert hit[0].line == line, str(hit[0])
    assert Path(hit[0].file).name == name  # cart problems are reported in the cart file, not the bench


def test_every_problem_names_file_line_and_path(mini_bench: Bench) -> None:
    for file in sorted(BROKEN.glob("*.toml")):
        for p in problems_of(file, mini_bench):
            assert p.file == str(file)
            assert p.line >= 1, str(p)
            assert p.message
            if p.code != "syntax":
                assert p.path, str(p)


@pytest.mark.parametrize("name", ["bench-two-errors-units.toml", "bench-two-errors-references.toml",
                                  "template-two-errors.toml"])
def test_two_errors_are_reported_together(name: str, mini_bench: Bench) -> None:
    expected = sorted((line, path) for n, line, path, _ in CASES if n == name)
    problems = problems_of(BROKEN / name, mini_bench)
    assert len(problems) == 2
    assert sorted((p.line, p.field_path) for p in problems) == expected
    assert expected[0][0] != expected[1][0]


def test_repeated_key_reports_its_own_line(mini_bench: Bench) -> None:
    # r appears in every section; the error on the 3rd section's r names the 3rd r's line.
    file = BROKEN / "bench-negative-resistance-third-section.toml"
    lines = file.read_text().splitlines()
    r_lines = [n for n, text in enumerate(lines, 1) if text.startswith("r = ")]
    (problem,) = problems_of(file, mini_bench)
    assert problem.line == r_lines[2] != r_lines[0]
    # bus appears in sources and loads; the load's bus is reported on the load's line.
    file = BROKEN / "bench-unknown-bus-in-load.toml"
    lines = file.read_text().splitlines()
    (problem,) = problems_of(file, mini_bench)
    assert lines[problem.line - 1] == 'bus = "B9"'


def test_check_command_prints_located_problems(capsys: pytest.CaptureFixture[str]) -> None:
    name = "template-two-errors.toml"
    code = main(["check", str(MINI / "mini-bench.toml"), str(BROKEN / name)])
    out = capsys.readouterr().out
    assert code != 0
    assert f"{MINI / 'mini-bench.toml'}: ok (bench)" in out
    for _, line, path, fragment in (c for c in CASES if c[0] == name):
        wanted = [o for o in out.splitlines() if o.strip().startswith(f"{BROKEN / name}:{line}: {path}: ")]
        assert wanted, out
        assert fragment in wanted[0]


def test_check_command_passes_the_valid_bases(capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["check", str(MINI)]) == 0
    assert capsys.readouterr().out.count(": ok (") == 3
