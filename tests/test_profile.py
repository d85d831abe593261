"""Profile loading (harness.profile, harness.config): every malformed input gives a
ConfigError naming the file, the key path and the problem, and `harness profile check`
turns it into exit code 2 without a traceback. Well-formed profiles load with the
frequency mapping omega = 2 pi f / fs (rad/sample), Nyquist = pi.

Property-based tests mutate real profiles at random (drop keys, change types, insert
junk keys, random numbers including nan, inf and negatives, random strings, random
text edits) and require a clean outcome every time: a loaded profile, or a ConfigError.
"""

from __future__ import annotations

import math
import re
import tomllib
from pathlib import Path

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from harness.cli import main
from harness.errors import ConfigError
from harness.profile import describe_profile, load_profile, parse_profile

ROOT = Path(__file__).resolve().parents[1]
PROFILES = sorted((ROOT / "profiles").glob("*.toml"))

BASE = """\
schema = 1

[profile]
id = "test-profile"
title = "test"
revision = "A"
sample_rate_hz = 48000
reference_hz = 1000

[[band]]
kind = "pass"
start_hz = 20.0
stop_hz = 18000.0
min_db = -0.5
max_db = 0.5

[[band]]
kind = "stop"
start_hz = 22000.0
stop_hz = 24000.0
max_db = -60.0

[phase]
rule = "linear"
max_deviation_deg = 5.0

[stimulus]
method = "multitone"
points_per_decade = 12

[decision]
rule = "guarded"
confidence = 0.95
"""


def variant(*edits: tuple[str, str], base: str = BASE) -> str:
    text = base
    for old, new in edits:
        assert text.count(old) == 1, f"edit target {old!r} not unique in the base profile"
        text = text.replace(old, new)
    return text


def write(tmp_path: Path, text: str, name: str = "p.toml") -> Path:
    path = tmp_path / name
    path.write_text(text)
    return path


def expect_config_error(path: Path, key: str | None, *fragments: str) -> ConfigError:
    with pytest.raises(ConfigError) as info:
        load_profile(path)
    err = info.value
    msg = str(err)
    assert err.file == str(path)
    assert str(path) in msg
    if key is not None:
        assert err.key == key, msg
        assert key in msg
    for frag in fragments:
        assert frag in msg, msg
    return err


def expect_cli_usage_error(path: Path, capsys, *fragments: str) -> str:
    rc = main(["profile", "check", str(path)])
    out, err = capsys.readouterr()
    assert rc == 2
    assert "Traceback" not in out + err
    assert err.startswith("harness: error: ")
    assert str(path) in err
    for frag in fragments:
        assert frag in err, err
    return err


def test_base_profile_loads(tmp_path):
    p = load_profile(write(tmp_path, BASE))
    assert p.id == "test-profile" and p.digital and p.sample_rate_hz == 48000
    assert [b.kind for b in p.mask.bands] == ["pass", "stop"]
    assert p.mask.reference_hz == 1000 and p.mask.phase.rule == "linear"


# --------------------------------------------------------------------------------------
# malformed profiles, one per problem
# --------------------------------------------------------------------------------------
MALFORMED = {
    # id: (edits, key path, message fragments)
    "unknown key with suggestion": (
        [("max_db = 0.5", "max_db = 0.5\nmax_dbb = 0.6")], "band[0].max_dbb",
        ["unknown key", "did you mean 'max_db'?"]),
    "unknown top-level table": (
        [("[decision]", "[decisions]\nrule = \"simple\"\n[decision]")], "decisions",
        ["unknown key", "did you mean 'decision'?"]),
    "unknown key without a near match": (
        [("revision = \"A\"", "revision = \"A\"\nzzzz = 1")], "profile.zzzz",
        ["unknown key", "known keys:"]),
    "missing key": ([("id = \"test-profile\"\n", "")], "profile.id", ["missing key"]),
    "missing schema": ([("schema = 1\n", "")], "schema", ["missing key"]),
    "missing band edge": ([("start_hz = 20.0\n", "")], "band[0].start_hz",
                          ["missing key", "start_hz, start_rad, start_nyquist"]),
    "missing stop ceiling": ([("max_db = -60.0\n", "")], "band[1].max_db", ["missing key"]),
    "wrong type, string for number": ([("start_hz = 20.0", "start_hz = \"abc\"")], "band[0].start_hz",
                                      ["must be a number", "a string 'abc'"]),
    "wrong type, boolean for number": ([("max_db = 0.5", "max_db = true")], "band[0].max_db",
                                       ["must be a number", "a boolean"]),
    "wrong type, number for string": ([("id = \"test-profile\"", "id = 7")], "profile.id",
                                      ["must be a string", "an integer"]),
    "wrong type, table for band array": ([("[[band]]\nkind = \"stop\"", "[[bands]]\nkind = \"stop\"")],
                                         "bands", ["unknown key", "did you mean 'band'?"]),
    "wrong type, float for whole number": ([("points_per_decade = 12", "points_per_decade = 12.5")],
                                           "stimulus.points_per_decade", ["must be a whole number"]),
    "non-finite number, nan": ([("max_db = 0.5", "max_db = nan")], "band[0].max_db",
                               ["must be a finite number", "nan"]),
    "non-finite number, inf": ([("stop_hz = 18000.0", "stop_hz = inf")], "band[0].stop_hz",
                               ["must be a finite number", "inf"]),
    "non-finite number, -inf": ([("max_db = -60.0", "max_db = -inf")], "band[1].max_db",
                                ["must be a finite number", "-inf"]),
    "min above max": ([("min_db = -0.5", "min_db = 0.7")], "band[0].min_db",
                      ["min_db 0.7 is above max_db 0.5"]),
    "min gain above max gain": ([("min_db = -0.5\nmax_db = 0.5", "min_gain = 1.1\nmax_gain = 0.9")],
                                "band[0].min_gain", ["min_gain 1.1 is above max_gain 0.9"]),
    "start not below stop": ([("start_hz = 20.0", "start_hz = 19000.0")], "band[0].start_hz",
                             ["start (19000 Hz) must be below stop (18000 Hz)"]),
    "start equal to stop": ([("start_hz = 20.0", "start_hz = 18000.0")], "band[0].start_hz",
                            ["must be below stop"]),
    "overlapping pass and stop bands": ([("start_hz = 22000.0", "start_hz = 17000.0")], "band[1]",
                                        ["overlaps pass band[0]", "transition band"]),
    "edge beyond Nyquist in Hz": ([("stop_hz = 24000.0", "stop_hz = 30000.0")], "band[1].stop_hz",
                                  ["30000 Hz lies beyond Nyquist (24000 Hz, pi rad/sample)"]),
    "edge beyond Nyquist in rad/sample": ([("stop_hz = 24000.0", "stop_rad = 3.2")], "band[1].stop_rad",
                                          ["3.2 rad/sample", "beyond Nyquist"]),
    "edge beyond Nyquist as fraction": ([("stop_hz = 24000.0", "stop_nyquist = 1.01")],
                                        "band[1].stop_nyquist", ["beyond Nyquist"]),
    "two forms of one edge": ([("stop_hz = 24000.0", "stop_hz = 24000.0\nstop_nyquist = 1.0")],
                              "band[1].stop_nyquist", ["give only one of"]),
    "negative frequency": ([("start_hz = 20.0", "start_hz = -20.0")], "band[0].start_hz",
                           ["negative frequency -20"]),
    "unknown phase rule": ([("rule = \"linear\"", "rule = \"linearr\"")], "phase.rule",
                           ["unknown value 'linearr'", "did you mean 'linear'?",
                            "none, linear, zero, limits"]),
    "unknown decision rule": ([("rule = \"guarded\"", "rule = \"guardd\"")], "decision.rule",
                              ["unknown value 'guardd'", "did you mean 'guarded'?"]),
    "unknown band kind": ([("kind = \"stop\"", "kind = \"stopp\"")], "band[1].kind",
                          ["unknown value 'stopp'"]),
    "phase rule needs its deviation": ([("max_deviation_deg = 5.0\n", "")], "phase.max_deviation_deg",
                                       ["missing key"]),
    "zero deviation": ([("max_deviation_deg = 5.0", "max_deviation_deg = 0.0")],
                       "phase.max_deviation_deg", ["must be greater than 0"]),
    "reference beyond Nyquist": ([("reference_hz = 1000", "reference_hz = 30000")], "profile.reference_hz",
                                 ["beyond Nyquist"]),
    "reference in no band": ([("reference_hz = 1000", "reference_hz = 20000")], "profile.reference_hz",
                             ["lies in no pass or limits band"]),
    "unsupported schema": ([("schema = 1", "schema = 2")], "schema", ["unsupported schema 2"]),
    "band tables misspelt": ([("[[band]]\nkind = \"pass\"", "[[bnd]]\nkind = \"pass\"")], "bnd",
                             ["unknown key", "did you mean 'band'?"]),
    "confidence out of range": ([("confidence = 0.95", "confidence = 1.5")], "decision.confidence",
                                ["between 0.5 and 1"]),
    "stop band with a floor": ([("max_db = -60.0", "max_db = -60.0\nmin_db = -90.0")], "band[1].min_db",
                               ["a stop band has a ceiling only"]),
    "mixed gain forms": ([("max_db = 0.5", "max_db = 0.5\nmax_gain = 1.05")], "band[0].max_gain",
                         ["mixes gain forms"]),
    "stimulus level above full scale": ([("points_per_decade = 12", "points_per_decade = 12\nlevel_dbfs = 3.0")],
                                        "stimulus.level_dbfs", ["must be at most 0"]),
    "huge integer (overflows a float)": ([("stop_hz = 18000.0", "stop_hz = " + "9" * 400)],
                                         "band[0].stop_hz", ["must be a finite number"]),
}


@pytest.mark.parametrize("case", sorted(MALFORMED))
def test_malformed_profile_names_file_key_and_problem(case, tmp_path, capsys):
    edits, key, fragments = MALFORMED[case]
    path = write(tmp_path, variant(*edits))
    expect_config_error(path, key, *fragments)
    expect_cli_usage_error(path, capsys, key, *fragments)


def test_profile_without_bands(tmp_path, capsys):
    head, tail = BASE.split("[[band]]", 1)
    text = head.replace("schema = 1\n", "schema = 1\nband = []\n") + "[phase]" + tail.split("[phase]", 1)[1]
    path = write(tmp_path, text)
    expect_config_error(path, "band", "a profile needs at least one [[band]]")
    expect_cli_usage_error(path, capsys, "at least one [[band]]")
    path = write(tmp_path, head + "[phase]" + tail.split("[phase]", 1)[1])
    expect_config_error(path, "band", "missing key")


def test_huge_integer_is_a_config_error_not_a_traceback(tmp_path, capsys):
    # regression: float() of a 400-digit TOML integer raised OverflowError
    path = write(tmp_path, variant(("sample_rate_hz = 48000", "sample_rate_hz = " + "1" * 400)))
    expect_config_error(path, "profile.sample_rate_hz", "must be a finite number")
    expect_cli_usage_error(path, capsys, "profile.sample_rate_hz")


def test_overlong_integer_is_a_config_error_not_a_traceback(tmp_path, capsys):
    # regression: tomllib lets int()'s ValueError (more than 4300 digits) escape
    path = write(tmp_path, variant(("sample_rate_hz = 48000", "sample_rate_hz = " + "1" * 5000)))
    expect_config_error(path, None, "TOML")
    expect_cli_usage_error(path, capsys, "TOML")


def test_deeply_nested_array_is_a_config_error_not_a_traceback(tmp_path, capsys):
    # regression: tomllib recurses on nested arrays and raised RecursionError
    path = write(tmp_path, variant(("revision = \"A\"", "revision = " + "[" * 5000 + "]" * 5000)))
    expect_config_error(path, None, "TOML syntax error")
    expect_cli_usage_error(path, capsys, "nested too deeply")


def test_toml_syntax_error_names_file_and_line(tmp_path, capsys):
    path = write(tmp_path, variant(("max_db = 0.5", "max_db = = 0.5")))
    err = expect_config_error(path, None, "TOML syntax error", "line 15")
    assert err.key is None
    expect_cli_usage_error(path, capsys, "TOML syntax error", "line 15")


def test_unterminated_string_is_a_syntax_error(tmp_path, capsys):
    path = write(tmp_path, variant(("title = \"test\"", "title = \"test")))
    expect_config_error(path, None, "TOML syntax error")
    expect_cli_usage_error(path, capsys, "TOML syntax error")


def test_missing_file(tmp_path, capsys):
    path = tmp_path / "nope.toml"
    expect_config_error(path, None, "file not found")
    expect_cli_usage_error(path, capsys, "file not found")


def test_directory_instead_of_file(tmp_path, capsys):
    expect_config_error(tmp_path, None, "is a directory")
    expect_cli_usage_error(tmp_path, capsys, "is a directory")


def test_non_utf8_file(tmp_path, capsys):
    path = tmp_path / "latin1.toml"
    path.write_bytes(BASE.replace('title = "test"', 'title = "t\xe9st"').encode("latin-1"))
    expect_config_error(path, None, "not UTF-8")
    expect_cli_usage_error(path, capsys, "not UTF-8")


# --------------------------------------------------------------------------------------
# frequency forms and Nyquist
# --------------------------------------------------------------------------------------
def test_edge_exactly_at_nyquist_is_valid(tmp_path):
    # omega = pi rad/sample is f = fs/2 = 24 kHz: allowed as an edge of a digital band
    p = load_profile(write(tmp_path, variant(("stop_hz = 24000.0", "stop_rad = 3.141592653589793"))))
    assert p.mask.bands[1].stop_hz == pytest.approx(24000.0, rel=1e-15)
    assert p.mask.bands[1].stop_hz <= 24000.0
    p = load_profile(write(tmp_path, variant(("stop_hz = 24000.0", "stop_nyquist = 1.0"))))
    assert p.mask.bands[1].stop_hz == 24000.0


def test_start_rad_exactly_pi_is_accepted_as_an_edge(tmp_path):
    # start_rad = pi (3.141592653589793) itself is a valid edge: in an analog profile
    # that carries its converter's rate as context the band may continue above it ...
    text = variant(("sample_rate_hz = 48000", "sample_rate_hz = 48000\ndomain = \"analog\""),
                   ("start_hz = 22000.0", "start_rad = 3.141592653589793"),
                   ("stop_hz = 24000.0", "stop_hz = 90000.0"))
    p = load_profile(write(tmp_path, text))
    assert not p.digital
    assert p.mask.bands[1].start_hz == pytest.approx(24000.0, rel=1e-15)   # pi * 48000 / (2 pi)
    # ... while in a digital profile a band that starts at pi has nowhere to go: the
    # complaint is about start/stop, not about pi lying beyond Nyquist
    text = variant(("start_hz = 22000.0", "start_rad = 3.141592653589793"),
                   ("stop_hz = 24000.0", "stop_rad = 3.141592653589793"))
    err = expect_config_error(write(tmp_path, text), "band[1].start_rad", "must be below stop")
    assert "Nyquist" not in str(err)


def test_rad_and_nyquist_edges_map_with_omega_equals_2_pi_f_over_fs(tmp_path):
    # omega = 2 pi f / fs: 0.5 rad/sample at 48 kS/s is 0.5 * 48000 / (2 pi) Hz;
    # 0.25 of Nyquist is 6000 Hz
    text = variant(("start_hz = 20.0", "start_rad = 0.5"),
                   ("stop_hz = 18000.0", "stop_nyquist = 0.75"),
                   ("reference_hz = 1000", "reference_hz = 10000"))
    p = load_profile(write(tmp_path, text))
    assert p.mask.bands[0].start_hz == pytest.approx(0.5 * 48000 / (2 * math.pi), rel=1e-15)
    assert p.mask.bands[0].stop_hz == pytest.approx(18000.0, rel=1e-15)


def test_rad_edge_without_sample_rate(tmp_path, capsys):
    text = variant(("sample_rate_hz = 48000\n", ""), ("start_hz = 20.0", "start_rad = 0.01"))
    path = write(tmp_path, text)
    expect_config_error(path, "band[0].start_rad", "needs [profile].sample_rate_hz")
    expect_cli_usage_error(path, capsys, "band[0].start_rad", "sample_rate_hz")


def test_nyquist_fraction_without_sample_rate(tmp_path):
    text = variant(("sample_rate_hz = 48000\n", ""), ("stop_hz = 24000.0", "stop_nyquist = 1.0"))
    expect_config_error(write(tmp_path, text), "band[1].stop_nyquist", "needs [profile].sample_rate_hz")


def test_digital_domain_without_sample_rate(tmp_path):
    text = variant(("sample_rate_hz = 48000\n", "domain = \"digital\"\n"))
    expect_config_error(write(tmp_path, text), "profile.domain", "needs [profile].sample_rate_hz")


def test_analog_profile_may_go_beyond_a_context_sample_rate(tmp_path):
    text = variant(("sample_rate_hz = 48000", "sample_rate_hz = 48000\ndomain = \"analog\""),
                   ("stop_hz = 24000.0", "stop_hz = 90000.0"))
    p = load_profile(write(tmp_path, text))
    assert p.mask.bands[1].stop_hz == 90000.0


def test_ripple_and_linear_gain_forms(tmp_path):
    text = variant(("min_db = -0.5\nmax_db = 0.5", "delta_1 = 0.01\ndelta_2 = 0.01"),
                   ("max_db = -60.0", "delta_s = 0.001"))
    p = load_profile(write(tmp_path, text))
    pb, sb = p.mask.bands
    # 20 lg(1 -/+ 0.01) and 20 lg(0.001) (textbook 20 lg)
    assert pb.min_db == pytest.approx(20 * math.log10(0.99)) and pb.max_db == pytest.approx(20 * math.log10(1.01))
    assert sb.max_db == pytest.approx(-60.0)
    text = variant(("min_db = -0.5\nmax_db = 0.5", "min_gain = 0.5\nmax_gain = 2.0"))
    pb = load_profile(write(tmp_path, text)).mask.bands[0]
    assert pb.min_db == pytest.approx(-6.020599913279624) and pb.max_db == pytest.approx(6.020599913279624)


# --------------------------------------------------------------------------------------
# profile check output
# --------------------------------------------------------------------------------------
def test_profile_check_prints_hz_and_rad_per_sample(capsys):
    path = ROOT / "profiles" / "hum-notch-50.toml"
    assert main(["profile", "check", str(path)]) == 0
    out, err = capsys.readouterr()
    assert "profile OK" in out and err == ""
    assert "rad/sample" in out
    rows = [ln.split() for ln in out.splitlines() if re.match(r"\s+\d+\s+(pass|stop|limits)\s", ln)]
    assert len(rows) == 3
    for row in rows:
        start_hz, stop_hz, start_rad, stop_rad = map(float, row[2:6])
        # omega = 2 pi f / fs at 48 kS/s, printed to 6 decimals
        assert start_rad == pytest.approx(2 * math.pi * start_hz / 48000, abs=1e-6)
        assert stop_rad == pytest.approx(2 * math.pi * stop_hz / 48000, abs=1e-6)
    assert rows[2][3] == "24000" and rows[2][5] == "3.141593"     # upper band ends at Nyquist = pi


def test_describe_profile_of_an_analog_profile_without_sample_rate():
    p = load_profile(ROOT / "profiles" / "ultrasonic-bp-40k.toml")
    text = describe_profile(p)
    assert "domain: analog" in text and "rad/sample" not in text
    assert "transition bands: ceiling +1.00 dB" in text


@pytest.mark.parametrize("path", PROFILES, ids=[p.name for p in PROFILES])
def test_every_shipped_profile_checks_ok(path, capsys):
    assert main(["profile", "check", str(path)]) == 0
    out, err = capsys.readouterr()
    assert out.rstrip().endswith("profile OK") and err == ""


# --------------------------------------------------------------------------------------
# property-based: mutated profiles never give a traceback
# --------------------------------------------------------------------------------------
def _toml_str(s: str) -> str:
    out = ['"']
    for ch in s:
        if ch in '"\\':
            out.append("\\" + ch)
        elif ord(ch) < 0x20 or ch == "\x7f":
            out.append(f"\\u{ord(ch):04x}")
        else:
            out.append(ch)
    out.append('"')
    return "".join(out)


def _toml_value(v) -> str:
    """Inline TOML for a value (written by hand: the standard library reads TOML only)."""
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, int):
        return str(v)
    if isinstance(v, float):
        if math.isnan(v):
            return "nan"
        if math.isinf(v):
            return "inf" if v > 0 else "-inf"
        return repr(v)
    if isinstance(v, str):
        return _toml_str(v)
    if isinstance(v, list):
        return "[" + ", ".join(_toml_value(x) for x in v) + "]"
    if isinstance(v, dict):
        return "{" + ", ".join(f"{_toml_str(k)} = {_toml_value(x)}" for k, x in v.items()) + "}"
    raise TypeError(type(v))


def to_toml(data: dict) -> str:
    return "".join(f"{_toml_str(k)} = {_toml_value(v)}\n" for k, v in data.items())


def test_toml_writer_round_trips_the_shipped_profiles():
    for path in PROFILES:
        data = tomllib.loads(path.read_text())
        assert tomllib.loads(to_toml(data)) == data


scalars = st.one_of(
    st.booleans(),
    st.integers(min_value=-(10**6), max_value=10**6),
    st.integers(min_value=-(10**400), max_value=10**400),
    st.floats(allow_nan=True, allow_infinity=True),
    st.sampled_from([0.0, -0.0, -1.0, 1e-300, 1e300, 3.141592653589793, 24000.0, 0.5]),
    st.text(max_size=12),
    st.sampled_from(["pass", "stop", "limits", "linear", "zero", "none", "guarded", "probability",
                     "analog", "digital", "multitone", "stepped-sine", "log", "linear"]),
)
values = st.recursive(
    scalars,
    lambda inner: st.one_of(st.lists(inner, max_size=4),
                            st.dictionaries(st.text(max_size=8), inner, max_size=3)),
    max_leaves=8,
)
junk_keys = st.one_of(st.text(max_size=10),
                      st.sampled_from(["kind", "start_hz", "stop_rad", "upper", "lower", "band", "phase",
                                       "max_db", "min_gain", "delta_s", "rule", "reference_hz",
                                       "transition_max_db", "frequencies_hz", "domain"]))


def _containers(node, path=()):
    """Every (path, container) inside a parsed TOML tree."""
    yield path, node
    items = node.items() if isinstance(node, dict) else enumerate(node)
    for k, v in items:
        if isinstance(v, (dict, list)):
            yield from _containers(v, path + (k,))


def _mutate(data, draw):
    conts = list(_containers(data))
    _, node = conts[draw(st.integers(0, len(conts) - 1))]
    op = draw(st.sampled_from(["drop", "replace", "insert"]))
    keys = list(node.keys()) if isinstance(node, dict) else list(range(len(node)))
    if op == "insert" or not keys:
        if isinstance(node, dict):
            node[draw(junk_keys)] = draw(values)
        else:
            node.insert(draw(st.integers(0, len(node))), draw(values))
        return
    k = keys[draw(st.integers(0, len(keys) - 1))]
    if op == "drop":
        del node[k]
    else:
        node[k] = draw(values)


def _check_outcome(path: Path):
    try:
        load_profile(path)
    except ConfigError as exc:
        msg = str(exc)
        assert exc.problem and exc.problem.strip()
        assert exc.file == str(path) and str(path) in msg


@settings(max_examples=200, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(data=st.data())
def test_mutated_profiles_load_or_raise_config_error(tmp_path, data):
    source = data.draw(st.sampled_from(PROFILES + [None]))
    tree = tomllib.loads(BASE if source is None else source.read_text())
    for _ in range(data.draw(st.integers(1, 3))):
        _mutate(tree, data.draw)
    path = tmp_path / "mutated.toml"
    path.write_text(to_toml(tree))
    _check_outcome(path)


@settings(max_examples=200, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(data=st.data())
def test_mutated_profiles_through_the_cli(tmp_path, capsys, data):
    source = data.draw(st.sampled_from(PROFILES))
    tree = tomllib.loads(source.read_text())
    for _ in range(data.draw(st.integers(1, 3))):
        _mutate(tree, data.draw)
    path = tmp_path / "mutated.toml"
    path.write_text(to_toml(tree))
    capsys.readouterr()
    rc = main(["profile", "check", str(path)])
    out, err = capsys.readouterr()
    assert rc in (0, 2)
    assert "Traceback" not in out + err
    if rc == 2:
        assert err.startswith("harness: error: ") and str(path) in err
    else:
        assert out.rstrip().endswith("profile OK")


@settings(max_examples=200, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(data=st.data())
def test_randomly_edited_profile_text_loads_or_raises_config_error(tmp_path, data):
    text = data.draw(st.sampled_from([BASE] + [p.read_text() for p in PROFILES]))
    for _ in range(data.draw(st.integers(1, 4))):
        i = data.draw(st.integers(0, len(text)))
        op = data.draw(st.sampled_from(["delete", "insert", "replace"]))
        piece = data.draw(st.one_of(st.text(max_size=4),
                                    st.sampled_from(["=", "[", "]", "[[", '"', "\n", "nan", "-", "inf",
                                                     "e999", "0x", "#", ",", "{", "}"])))
        if op == "delete":
            text = text[:i] + text[i + data.draw(st.integers(1, 8)):]
        elif op == "insert":
            text = text[:i] + piece + text[i:]
        else:
            text = text[:i] + piece + text[i + len(piece):]
    path = tmp_path / "edited.toml"
    path.write_text(text, encoding="utf-8", errors="surrogatepass")
    _check_outcome(path)


@settings(max_examples=200, deadline=None)
@given(st.dictionaries(st.text(max_size=8), values, max_size=6))
def test_random_mappings_never_escape_as_other_errors(data):
    try:
        parse_profile(data, file="random.toml")
    except ConfigError as exc:
        assert exc.problem and exc.file == "random.toml"
