"""Method-file reader: values, defaults, warnings and one-line errors.

Check values come from the example method file of issue 4 (copied below) unless a line says
otherwise. Limits: pH scale 0-14 and liquid water 0-100 C at 1 atm (handbook values); column
geometry and temperature ranges are common practice.
"""

from __future__ import annotations

import copy
import math
import re
import tomllib

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from retpred.errors import InputError, MethodError
from retpred.method import (
    PHASE_CLASSES,
    Gradient,
    HsmParameters,
    Method,
    load_method,
    method_summary,
    parse_method,
)

# The example method file of issue 4.
FULL = """\
[column]
phase = "C18"
length_mm = 100.0
inner_diameter_mm = 2.1
particle_um = 1.7
dead_time_min = 0.55
ph_min = 2.0
ph_max = 8.0
[column.hsm]
H = 1.0
S = 0.02
A = -0.1
B = 0.0
C28 = 0.1
C70 = 0.2
kEB = 8.0
[mobile_phase]
organic = "acetonitrile"
a_organic_percent = 0
b_organic_percent = 100
ph = 2.7
temperature_c = 40
[gradient]
flow_ml_min = 0.4
dwell_volume_ml = 0.2
program = [[0.0, 5.0], [1.0, 5.0], [10.0, 95.0], [12.0, 95.0]]
[instrument]
max_pressure_bar = 600
"""

SETTINGS = settings(max_examples=150, deadline=None,
                    suppress_health_check=[HealthCheck.function_scoped_fixture])


def full_data() -> dict:
    return tomllib.loads(FULL)


def write(tmp_path, text: str, name: str = "method.toml"):
    path = tmp_path / name
    path.write_text(text, encoding="utf-8")
    return path


# --------------------------------------------------------------------------------------------
# valid files
# --------------------------------------------------------------------------------------------


def test_full_example_round_trips(tmp_path):
    method = load_method(write(tmp_path, FULL))
    assert isinstance(method, Method)
    c, mp, g = method.column, method.mobile_phase, method.gradient
    assert (c.phase, c.length_mm, c.inner_diameter_mm, c.particle_um) == ("C18", 100.0, 2.1, 1.7)
    assert c.dead_time_min == 0.55 and (c.ph_min, c.ph_max) == (2.0, 8.0)
    assert c.hsm == HsmParameters(H=1.0, S=0.02, A=-0.1, B=0.0, C28=0.1, C70=0.2, kEB=8.0)
    assert (mp.organic, mp.a_organic_percent, mp.b_organic_percent) == ("acetonitrile", 0, 100)
    assert (mp.ph, mp.temperature_c) == (2.7, 40.0)
    assert g.flow_ml_min == 0.4 and g.dwell_volume_ml == 0.2
    # 2-value rows take the [gradient] flow.
    assert g.program == ((0.0, 5.0, 0.4), (1.0, 5.0, 0.4), (10.0, 95.0, 0.4), (12.0, 95.0, 0.4))
    assert method.instrument.max_pressure_bar == 600.0
    assert method.source == str(tmp_path / "method.toml")
    assert method.warnings == ()
    # phi = %B / 100 with A = 0 % and B = 100 % organic.
    times, phis, flows = method.phi_program()
    assert times == [0.0, 1.0, 10.0, 12.0]
    assert phis == pytest.approx([0.05, 0.05, 0.95, 0.95])
    assert flows == [0.4] * 4


def test_summary_matches_issue_example(tmp_path):
    # Expected text is the example written in issue 4.
    method = load_method(write(tmp_path, FULL))
    expected = "C18 100 x 2.1 mm, 1.7 um; acetonitrile, pH 2.7, 40 C; 0.4 mL/min; 5-95 %B in 9 min"
    assert method_summary(method) == expected


def test_summary_marks_assumptions_and_isocratic():
    data = full_data()
    del data["mobile_phase"]["ph"], data["mobile_phase"]["temperature_c"]
    data["gradient"]["program"] = [[0, 40]]
    text = method_summary(parse_method(data, "x.toml"))
    assert text.endswith("pH 2.7 (assumed), 30 C (assumed); 0.4 mL/min; isocratic 40 %B")


def test_bom_is_tolerated(tmp_path):
    path = tmp_path / "bom.toml"
    path.write_bytes(b"\xef\xbb\xbf" + FULL.encode())
    assert load_method(path).column.phase == "C18"


def test_isocratic_single_row():
    data = full_data()
    data["mobile_phase"].update(a_organic_percent=5, b_organic_percent=95)
    data["gradient"]["program"] = [[0, 50]]
    method = parse_method(data, "iso.toml")
    assert method.gradient.program == ((0.0, 50.0, 0.4),)
    # phi = (A + (B - A) * %B/100) / 100 = (5 + 90 * 0.5) / 100 = 0.5 (hand calculation)
    assert method.phi_program()[1] == pytest.approx([0.5])


def test_three_value_rows_keep_their_flow_and_flow_key_is_optional():
    data = full_data()
    del data["gradient"]["flow_ml_min"]
    data["gradient"]["program"] = [[0, 5, 0.3], [10, 95, 0.5]]
    g = parse_method(data, "f.toml").gradient
    assert g.program == ((0.0, 5.0, 0.3), (10.0, 95.0, 0.5))
    assert g.flow_ml_min == 0.3


def test_mixed_rows_use_default_flow_for_two_value_rows():
    data = full_data()
    data["gradient"]["program"] = [[0, 5], [10, 95, 0.6]]
    assert parse_method(data, "f.toml").gradient.program == ((0.0, 5.0, 0.4), (10.0, 95.0, 0.6))


@pytest.mark.parametrize("spelling,expected", [
    ("c18", "C18"), ("Polar-Embedded", "polar-embedded"), ("polar embedded", "polar-embedded"),
    ("PHENYL", "phenyl"), ("cn", "CN"), ("c8", "C8"),
])
def test_phase_names_case_insensitive(spelling, expected):
    data = full_data()
    data["column"]["phase"] = spelling
    assert parse_method(data, "p.toml").column.phase == expected


@pytest.mark.parametrize("spelling,expected", [
    ("acn", "acetonitrile"), ("MeOH", "methanol"), ("Methanol", "methanol"),
])
def test_organic_aliases(spelling, expected):
    data = full_data()
    data["mobile_phase"]["organic"] = spelling
    assert parse_method(data, "o.toml").mobile_phase.organic == expected


def test_missing_optional_values_warn_and_use_defaults():
    data = full_data()
    del data["mobile_phase"]["ph"], data["mobile_phase"]["temperature_c"]
    del data["gradient"]["dwell_volume_ml"], data["instrument"]
    method = parse_method(data, "d.toml")
    text = " | ".join(method.warnings)
    assert "ph" in text and "dwell" in text and "temperature" in text
    assert len(method.warnings) == 3
    # 0.1 % formic acid is about pH 2.7 (common practice); UHPLC dwell 0.1-0.5 mL (common
    # practice, design note section 1): the 2.1 mm x 1.7 um column counts as UHPLC.
    assert method.ph == 2.7
    assert 0.1 <= method.dwell_volume_ml <= 0.5


def test_default_dwell_for_conventional_hplc():
    data = full_data()
    del data["gradient"]["dwell_volume_ml"]
    data["column"].update(inner_diameter_mm=4.6, particle_um=5.0, length_mm=150)
    method = parse_method(data, "h.toml")
    # Conventional HPLC: 0.5-2 mL (common practice, design note section 1).
    assert 0.5 <= method.dwell_volume_ml <= 2.0
    assert any("dwell" in w and "HPLC" in w for w in method.warnings)


def test_ph_outside_column_range_is_a_warning():
    data = full_data()
    data["mobile_phase"]["ph"] = 10.0
    method = parse_method(data, "w.toml")
    assert method.ph == 10.0
    assert any("outside the column" in w for w in method.warnings)


@pytest.mark.parametrize("temperature,warns", [(40, False), (65, True), (95, True), (3, True)])
def test_temperature_warnings(temperature, warns):
    # Usual ovens 5-90 C, silica columns often rated to about 60 C (common practice).
    data = full_data()
    data["mobile_phase"]["temperature_c"] = temperature
    method = parse_method(data, "t.toml")
    assert any("temperature" in w for w in method.warnings) is warns


# --------------------------------------------------------------------------------------------
# invalid files: every case names the file and the field
# --------------------------------------------------------------------------------------------


def _set(path: str, value):
    def edit(data):
        *parents, last = path.split(".")
        node = data
        for p in parents:
            node = node[p]
        node[last] = value
    return edit


def _delete(path: str):
    def edit(data):
        *parents, last = path.split(".")
        node = data
        for p in parents:
            node = node[p]
        del node[last]
    return edit


def _program(rows):
    return _set("gradient.program", rows)


INVALID = [
    ("unknown section", _set("instrumnet", {}), "instrumnet", "instrument"),
    ("unknown key", _set("column.lenght_mm", 100), "column.lenght_mm", "length_mm"),
    ("key in wrong table", _set("phase", "C18"), "phase", "[column]"),
    ("string number", _set("gradient.flow_ml_min", "0.4"), "gradient.flow_ml_min", "number"),
    ("bool number", _set("column.length_mm", True), "column.length_mm", "number"),
    ("nan", _set("column.length_mm", math.nan), "column.length_mm", "finite"),
    ("zero flow", _set("gradient.flow_ml_min", 0), "gradient.flow_ml_min", "> 0"),
    ("negative flow", _set("gradient.flow_ml_min", -0.1), "gradient.flow_ml_min", "> 0"),
    ("row flow", _program([[0, 5, -1.0]]), "gradient.program[0][2]", "> 0"),
    ("%B above 100", _program([[0, 5], [10, 101]]), "gradient.program[1][1]", "%B"),
    ("%B below 0", _program([[0, -1]]), "gradient.program[0][1]", "%B"),
    ("organic % A", _set("mobile_phase.a_organic_percent", -5), "mobile_phase.a_organic_percent",
     "0-100"),
    ("organic % B", _set("mobile_phase.b_organic_percent", 120),
     "mobile_phase.b_organic_percent", "0-100"),
    ("three rows at one time", _program([[0, 5], [5, 50], [5, 95], [5, 60]]),
     "gradient.program[3]", "step"),
    ("time decreasing", _program([[0, 5], [5, 50], [4, 95]]), "gradient.program[2]", "increase"),
    ("not starting at 0", _program([[1, 5], [5, 95]]), "gradient.program[0]", "time 0"),
    ("row too short", _program([[0]]), "gradient.program[0]", "row"),
    ("row not a list", _program([5]), "gradient.program[0]", "row"),
    ("row text", _program([[0, "5"]]), "gradient.program[0][1]", "number"),
    ("no program", _delete("gradient.program"), "gradient.program", "program"),
    ("no gradient", _delete("gradient"), "gradient", "gradient"),
    ("no column", _delete("column"), "column", "column"),
    ("empty program", _program([]), "gradient.program", "empty"),
    ("unknown phase", _set("column.phase", "C30x"), "column.phase", "C18, C8, phenyl"),
    ("phase not text", _set("column.phase", 18), "column.phase", "text"),
    ("unknown organic", _set("mobile_phase.organic", "thf"), "mobile_phase.organic",
     "acetonitrile"),
    ("pH above 14", _set("mobile_phase.ph", 14.5), "mobile_phase.ph", "0-14"),
    ("pH below 0", _set("mobile_phase.ph", -0.5), "mobile_phase.ph", "0-14"),
    ("column pH range", _set("column.ph_min", 9.0), "column.ph_min", "below"),
    ("freezing", _set("mobile_phase.temperature_c", -1), "mobile_phase.temperature_c", "0-100"),
    ("boiling", _set("mobile_phase.temperature_c", 101), "mobile_phase.temperature_c", "0-100"),
    ("zero length", _set("column.length_mm", 0), "column.length_mm", "> 0"),
    ("long column", _set("column.length_mm", 600), "column.length_mm", "10-500"),
    ("short column", _set("column.length_mm", 5), "column.length_mm", "10-500"),
    ("wide column", _set("column.inner_diameter_mm", 60), "column.inner_diameter_mm", "0.1-50"),
    ("negative id", _set("column.inner_diameter_mm", -2.1), "column.inner_diameter_mm", "> 0"),
    ("tiny particles", _set("column.particle_um", 0.2), "column.particle_um", "0.5-20"),
    ("big particles", _set("column.particle_um", 25), "column.particle_um", "0.5-20"),
    ("dead time 0", _set("column.dead_time_min", 0), "column.dead_time_min", "> 0"),
    ("dead time < 0", _set("column.dead_time_min", -0.5), "column.dead_time_min", "> 0"),
    ("dwell < 0", _set("gradient.dwell_volume_ml", -0.1), "gradient.dwell_volume_ml", ">= 0"),
    ("pressure 0", _set("instrument.max_pressure_bar", 0), "instrument.max_pressure_bar", "> 0"),
    ("hsm incomplete", _delete("column.hsm.kEB"), "column.hsm", "kEB"),
    ("hsm typo", _set("column.hsm.keb", 8.0), "column.hsm.keb", "kEB"),
    ("hsm not a table", _set("column.hsm", 1.0), "column.hsm", "table"),
    ("section not a table", _set("gradient", [1, 2]), "gradient", "table"),
    ("no flow anywhere", _delete("gradient.flow_ml_min"), "gradient.program[0]", "flow"),
]


@pytest.mark.parametrize("label,edit,field,needle", INVALID, ids=[c[0] for c in INVALID])
def test_invalid_method_names_file_and_field(label, edit, field, needle):
    data = copy.deepcopy(full_data())
    edit(data)
    with pytest.raises(MethodError) as info:
        parse_method(data, "lab/method.toml")
    err = info.value
    assert err.path == "lab/method.toml"
    assert err.field == field
    text = str(err)
    assert "lab/method.toml" in text and f"field '{field}'" in text
    assert needle in text
    assert "\n" not in text


def test_invalid_value_reports_the_line_in_the_file(tmp_path):
    text = FULL.replace("particle_um = 1.7", "particle_um = 0.1")
    with pytest.raises(MethodError) as info:
        load_method(write(tmp_path, text))
    assert info.value.line == 5  # line of 'particle_um' in FULL
    assert info.value.field == "column.particle_um"


def test_several_faults_report_the_first_in_file_order(tmp_path):
    """A bad value on line 5 comes before a bad value in [gradient] and before a missing
    [mobile_phase] table (which has no line): the user fixes faults top to bottom."""
    text = FULL.replace("particle_um = 1.7", "particle_um = 0.1")
    text = text.replace("flow_ml_min = 0.4", "flow_ml_min = -1")
    start, end = text.index("[mobile_phase]"), text.index("[gradient]")
    with pytest.raises(MethodError) as info:
        load_method(write(tmp_path, text[:start] + text[end:]))
    assert (info.value.line, info.value.field) == (5, "column.particle_um")
    # with the column fixed, the gradient fault (which has a line) still precedes the
    # missing table; with both fixed, the missing table is reported
    text = text.replace("particle_um = 0.1", "particle_um = 1.7")
    with pytest.raises(MethodError) as info:
        load_method(write(tmp_path, text[:start] + text[end:]))
    assert info.value.field == "gradient.flow_ml_min"
    fixed = text.replace("flow_ml_min = -1", "flow_ml_min = 0.4")
    with pytest.raises(MethodError, match=r"missing required table \[mobile_phase\]"):
        load_method(write(tmp_path, fixed[:start] + fixed[end:]))


def test_typo_suggests_closest_key(tmp_path):
    text = FULL.replace("dwell_volume_ml", "dwel_volume_ml")
    with pytest.raises(MethodError, match="did you mean 'dwell_volume_ml'"):
        load_method(write(tmp_path, text))


def test_toml_syntax_error_gives_line(tmp_path):
    lines = FULL.splitlines()
    lines[20] = "ph = = 2.7"  # line 21
    with pytest.raises(MethodError) as info:
        load_method(write(tmp_path, "\n".join(lines)))
    err = info.value
    assert err.line == 21 and "TOML syntax error" in str(err)
    assert str(tmp_path / "method.toml") in str(err) and "\n" not in str(err)


def test_missing_file(tmp_path):
    with pytest.raises(MethodError, match="not found") as info:
        load_method(tmp_path / "nope.toml")
    assert info.value.path == str(tmp_path / "nope.toml")


def test_directory_is_not_a_method(tmp_path):
    with pytest.raises(MethodError, match="directory"):
        load_method(tmp_path)


def test_not_utf8(tmp_path):
    path = tmp_path / "latin.toml"
    # 0xE9 is 'e acute' in Latin-1 (ISO/IEC 8859-1) and not valid UTF-8 on its own.
    path.write_bytes(FULL.replace('"C18"', '"C18 \xe9"').encode("latin-1"))
    with pytest.raises(MethodError, match="UTF-8") as info:
        load_method(path)
    assert info.value.line == 2


def test_empty_file(tmp_path):
    with pytest.raises(MethodError, match="empty"):
        load_method(write(tmp_path, "  \n"))


def test_method_error_is_input_error():
    with pytest.raises(InputError):
        parse_method({}, "m.toml")


# --------------------------------------------------------------------------------------------
# property tests
# --------------------------------------------------------------------------------------------

KEYS = ["column", "mobile_phase", "gradient", "instrument", "phase", "length_mm", "program",
        "flow_ml_min", "ph", "organic", "hsm", "kEB", "temperature_c"]
leaf = (st.none() | st.booleans() | st.integers(-10**6, 10**6) | st.floats(allow_nan=True)
        | st.text(max_size=8) | st.sampled_from(PHASE_CLASSES + ("acn", "meoh")))
values = st.recursive(leaf, lambda inner: st.lists(inner, max_size=4)
                      | st.dictionaries(st.sampled_from(KEYS) | st.text(max_size=4), inner,
                                        max_size=4), max_leaves=12)


@SETTINGS
@given(st.binary(max_size=400))
def test_arbitrary_bytes_only_raise_method_error(tmp_path, blob):
    path = tmp_path / "fuzz.toml"
    path.write_bytes(blob)
    try:
        load_method(path)
    except MethodError as err:
        assert "\n" not in str(err) and str(path) in str(err)


@SETTINGS
@given(st.text(max_size=300))
def test_arbitrary_text_only_raises_method_error(tmp_path, text):
    path = tmp_path / "fuzz.toml"
    path.write_bytes(text.encode("utf-8", errors="replace"))
    try:
        load_method(path)
    except MethodError:
        pass


@SETTINGS
@given(st.dictionaries(st.sampled_from(KEYS) | st.text(max_size=4), values, max_size=5))
def test_arbitrary_tables_only_raise_method_error(data):
    try:
        parse_method(data, "fuzz.toml")
    except MethodError:
        pass


def _leaf_paths(node, prefix=()):
    if isinstance(node, dict):
        for k, v in node.items():
            yield from _leaf_paths(v, (*prefix, k))
    elif isinstance(node, list):
        for i, v in enumerate(node):
            yield from _leaf_paths(v, (*prefix, i))
    else:
        yield prefix


FULL_LEAVES = list(_leaf_paths(full_data()))


@SETTINGS
@given(st.sampled_from(FULL_LEAVES), leaf)
def test_one_changed_value_gives_method_or_method_error(where, value):
    data = copy.deepcopy(full_data())
    node = data
    for key in where[:-1]:
        node = node[key]
    node[where[-1]] = value
    try:
        method = parse_method(data, "mut.toml")
    except MethodError as err:
        assert err.field is not None and "mut.toml" in str(err)
        dotted = re.sub(r"\[\d+\]", "", err.field)
        assert dotted.split(".")[0] == where[0]  # the error points at the edited table
    else:
        assert isinstance(method.gradient, Gradient)


@SETTINGS
@given(st.lists(st.tuples(st.floats(0.01, 50), st.floats(0, 100)), min_size=0, max_size=8))
def test_valid_programs_are_kept_exactly(steps):
    rows, t = [[0.0, steps[0][1] if steps else 5.0]], 0.0
    for dt, b in steps:
        t += dt
        rows.append([t, b])
    data = full_data()
    data["gradient"]["program"] = rows
    program = parse_method(data, "p.toml").gradient.program
    assert [list(r[:2]) for r in program] == rows
    assert all(r[2] == 0.4 for r in program)


def test_two_rows_at_one_time_are_a_step(tmp_path):
    """A step gradient (two rows at one time) is accepted and kept as written."""
    text = FULL.replace("program = [[0.0, 5.0], [1.0, 5.0], [10.0, 95.0], [12.0, 95.0]]",
                           "program = [[0.0, 5.0], [4.0, 5.0], [4.0, 60.0], [12.0, 60.0]]")
    p = tmp_path / "step.toml"
    p.write_text(text)
    m = load_method(p)
    assert [row[:2] for row in m.gradient.program] == [(0.0, 5.0), (4.0, 5.0), (4.0, 60.0),
                                                      (12.0, 60.0)]
