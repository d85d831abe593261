"""Record files: safe names, atomic writes that never overwrite, calibration checks."""

import datetime as dt
import json
import os

import numpy as np
import pytest

from harness.calibration import load_calibration, write_calibration
from harness.certificate import canonical_json, new_stem, safe_name, write_new_file, write_unique
from harness.errors import InvalidMeasurement
from harness.station import CalibrationConfig, Station


@pytest.mark.parametrize("serial", ["../../etc/passwd", "/abs/path", "a b\\c", "..", ".hidden", "",
                                    "ü-Ω-序列", "x" * 300, "CON", "a\x00b"])
def test_safe_name_never_escapes(tmp_path, serial):
    name = safe_name(serial)
    assert "/" not in name and "\\" not in name and not name.startswith(".")
    assert 0 < len(name) <= 60
    p = write_new_file(tmp_path / f"{name}.json", b"{}")
    assert p.parent == tmp_path


def test_different_serials_never_share_a_name():
    assert safe_name("A/1") != safe_name("A_1")
    assert safe_name("A 1") != safe_name("A:1")


def test_write_new_file_refuses_to_overwrite(tmp_path):
    p = write_new_file(tmp_path / "x.json", b"first")
    with pytest.raises(FileExistsError):
        write_new_file(p, b"second")
    assert p.read_bytes() == b"first"
    q = write_unique(tmp_path, "x", ".json", b"second")
    assert q.name == "x-2.json" and p.read_bytes() == b"first"
    assert not [f for f in os.listdir(tmp_path) if f.startswith(".tmp-")]


def test_new_stem_skips_taken_names(tmp_path):
    when = dt.datetime(2026, 12, 2, 10, 0, 0, tzinfo=dt.timezone.utc)
    s1 = new_stem(tmp_path, "SN1", when)
    (tmp_path / f"{s1}.json").write_text("{}")
    s2 = new_stem(tmp_path, "SN1", when)
    assert s2 != s1 and s2.startswith(s1)


def test_canonical_json_is_stable_and_has_no_nan():
    a = canonical_json({"b": 1.0, "a": [np.float64(0.1), np.inf, np.nan]})
    assert a == b'{"a":[0.1,null,null],"b":1.0}'


def _station(tmp_path, valid_days=30, sid="st-1"):
    return Station(id=sid, backend="simulated", sample_rate_hz=48000.0, max_output_dbfs=-3.0,
                   reference_channel=False, calibration=CalibrationConfig(tmp_path / "cal.json", valid_days),
                   path=str(tmp_path / "st.toml"))


def _cal_doc(sid="st-1", due="2099-01-01T00:00:00Z", created="2026-12-01T00:00:00Z"):
    return {"schema": 1, "id": "cal-x", "station_id": sid, "created_utc": created, "due_utc": due,
            "sample_rate_hz": 48000.0, "freq_hz": [10.0, 100.0, 1000.0], "h_re": [1.0, 1.0, 1.0],
            "h_im": [0.0, 0.0, 0.0], "u_gain_db": [0.001] * 3, "u_phase_deg": [0.01] * 3, "dof": [7, 7, 7]}


def test_calibration_missing_expired_or_foreign_is_refused(tmp_path):
    st = _station(tmp_path)
    with pytest.raises(InvalidMeasurement, match="missing"):
        load_calibration(st)
    write_calibration(st, _cal_doc(due="2020-01-01T00:00:00Z"))
    with pytest.raises(InvalidMeasurement, match="expired"):
        load_calibration(st)
    write_calibration(st, _cal_doc(sid="other", created="2026-12-02T00:00:00Z"))
    with pytest.raises(InvalidMeasurement, match="belongs to station 'other'"):
        load_calibration(st)
    write_calibration(st, _cal_doc(created="2026-12-03T00:00:00Z"))
    cal, info = load_calibration(st)
    assert info["id"] == "cal-x"
    h, ug, up, dof = cal.at([31.6, 500.0])
    assert np.allclose(h, 1.0)
    # every earlier calibration was kept under an archive name
    archived = sorted(p.name for p in tmp_path.glob("cal.*.json"))
    assert len(archived) == 2  # three writes: the two earlier ones archived
    assert json.loads((tmp_path / "cal.json").read_text())["created_utc"] == "2026-12-03T00:00:00Z"


def test_calibration_outside_range_is_invalid(tmp_path):
    st = _station(tmp_path)
    write_calibration(st, _cal_doc())
    cal, _ = load_calibration(st)
    with pytest.raises(InvalidMeasurement, match="covers"):
        cal.at([5.0, 100.0])
