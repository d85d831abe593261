"""Station files: validation messages name the file, the key and the problem."""

import textwrap
from pathlib import Path

import pytest

from harness.cli import main
from harness.errors import ConfigError
from harness.station import load_station

FIXTURES = Path(__file__).resolve().parent.parent / "fixtures"


def write(tmp_path, body: str, name: str = "st.toml") -> Path:
    (tmp_path / "dut.toml").write_text((FIXTURES / "dut-aaf-nominal.toml").read_text())
    p = tmp_path / name
    p.write_text(textwrap.dedent(body))
    return p


GOOD = """
[station]
id = "bench-1"
backend = "simulated"
device_model = "dut.toml"
sample_rate_hz = 48000
reference_channel = true
max_output_dbfs = -6.0
[station.type_b]
level_db = 0.02
flatness_db = 0.01
phase_deg = 0.1
"""


def test_demo_station_loads():
    st = load_station(FIXTURES / "station-demo.toml")
    assert st.backend == "simulated" and st.reference_channel
    assert st.device_model.is_file()


def test_good_station(tmp_path):
    st = load_station(write(tmp_path, GOOD))
    assert st.max_output_dbfs == -6.0
    assert st.type_b.level_db == 0.02
    assert st.device_model == (tmp_path / "dut.toml").resolve()


@pytest.mark.parametrize("change, key, words", [
    (("backend = \"simulated\"", "backend = \"simulatd\""), "station.backend", "did you mean 'simulated'"),
    (("max_output_dbfs = -6.0", "max_output_dbfs = 3.0"), "station.max_output_dbfs", "at most 0"),
    (("max_output_dbfs = -6.0", "max_ouput_dbfs = -6.0"), "station.max_ouput_dbfs", "did you mean"),
    (("device_model = \"dut.toml\"", "device_model = \"missing.toml\""), "station.device_model", "not found"),
    (("level_db = 0.02", "level_db = -0.02"), "station.type_b.level_db", "at least 0"),
    (("sample_rate_hz = 48000", "sample_rate_hz = \"fast\""), "station.sample_rate_hz", "must be a number"),
    (("reference_channel = true", "reference_channel = false"), "calibration.file", "reference channel"),
])
def test_bad_station_names_key(tmp_path, change, key, words):
    p = write(tmp_path, GOOD.replace(*change))
    with pytest.raises(ConfigError) as exc:
        load_station(p)
    msg = str(exc.value)
    assert str(p) in msg and key in msg and words in msg


def test_bad_station_via_cli_exit_2(tmp_path, capsys):
    p = write(tmp_path, GOOD.replace("max_output_dbfs = -6.0", "max_output_dbfs = nan"))
    prof = Path(__file__).resolve().parent.parent / "profiles" / "aaf-48k.toml"
    rc = main(["run", str(prof), "--station", str(p), "--serial", "X1", "--out", str(tmp_path / "o")])
    err = capsys.readouterr().err
    assert rc == 2
    assert "station.max_output_dbfs" in err and "finite" in err and "Traceback" not in err
