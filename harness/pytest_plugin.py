"""pytest plugin of the filter compliance harness (entry point ``pytest11: harness``).

Installed with the harness, it lets a firmware or board team assert in ordinary pytest
tests that their filter meets its profile::

    from harness.pytest_plugin import assert_compliant

    def test_notch(compliance, simulated_board):
        board = simulated_board("notch_coeffs.json")             # the firmware's coefficients
        result = compliance.measure("notch-profile.toml", board=board)
        assert_compliant(result)                                 # or result.assert_compliant()

In CI the test measures a simulated board built from the coefficients on a built-in
simulated station; on a bench ``pytest --harness-station bench.toml`` measures the unit
on that station instead (the board argument is then ignored).

Options
-------
``--harness-station FILE``  station file to measure on (default: built-in simulated station)
``--harness-out DIR``       keep the records under DIR/<test> (default: the test's tmp_path/harness)
``--harness-serial SN``     serial number of the unit on a real station

Markers
-------
``needs_station``    the test needs a station file (real hardware): skipped without --harness-station
``simulation_only``  the test needs a simulated board: skipped when the station is real hardware

Fixtures
--------
``filter_station``   (session) the `StationChoice`: the given station or the built-in simulated one
``simulated_board``  factory: ``simulated_board(source, imperfections=..., quantize=...)`` -> DeviceModel
``compliance``       a `ComplianceSession`: ``.measure(profile, board=...)``, ``.check_design(...)``,
                     ``.profile(path)``; results go into the JUnit XML report as properties

Only pytest and the standard library are imported here; the measurement code loads
when a test first uses a fixture.
"""

from __future__ import annotations

from pathlib import Path

import pytest

from harness.pytest_compliance import (ComplianceFailure, ComplianceResult, ComplianceSession, StationChoice,
                                       _safe, assert_compliant, load_station_choice, make_board)

__all__ = ["assert_compliant", "ComplianceFailure", "ComplianceResult", "ComplianceSession", "StationChoice",
           "make_board"]

_CHOICE = pytest.StashKey[StationChoice]()
_RESULTS = pytest.StashKey[list]()

MARKERS = {
    "needs_station": "needs_station: the test needs a measurement station (real hardware); skipped unless "
                     "pytest runs with --harness-station FILE",
    "simulation_only": "simulation_only: the test needs a simulated board (e.g. injected imperfections); "
                       "skipped when --harness-station names real hardware",
}


# --------------------------------------------------------------------------------------
# options, markers, configuration
# --------------------------------------------------------------------------------------
def pytest_addoption(parser):
    group = parser.getgroup("harness", "filter compliance harness")
    group.addoption("--harness-station", metavar="FILE", default=None,
                    help="station file (TOML) to measure on; without it tests measure simulated boards on "
                         "a built-in simulated station and tests marked needs_station are skipped")
    group.addoption("--harness-out", metavar="DIR", default=None,
                    help="write certificates and plots under DIR/<test name> (default: the test's "
                         "tmp_path/harness, where pytest keeps its temporary files)")
    group.addoption("--harness-serial", metavar="SN", default=None,
                    help="serial number of the unit on the station (recorded in its certificates)")


def pytest_configure(config):
    for text in MARKERS.values():
        config.addinivalue_line("markers", text)
    path = config.getoption("harness_station", None)
    choice = StationChoice()
    if path:
        from harness.errors import HarnessError

        try:
            choice = load_station_choice(path, base_dir=config.invocation_params.dir)
        except HarnessError as exc:
            raise pytest.UsageError(f"--harness-station: {exc}") from None
    config.stash[_CHOICE] = choice
    config.stash[_RESULTS] = []


def _choice(config) -> StationChoice:
    return config.stash.get(_CHOICE, StationChoice())


def pytest_report_header(config):
    choice = _choice(config)
    if choice.given:
        return [f"harness: {choice.describe()}"]
    return None


def pytest_collection_modifyitems(config, items):
    choice = _choice(config)
    for item in items:
        if item.get_closest_marker("needs_station") and not choice.given:
            item.add_marker(pytest.mark.skip(
                reason="needs a measurement station: run pytest with --harness-station FILE"))
        if item.get_closest_marker("simulation_only") and choice.hardware:
            item.add_marker(pytest.mark.skip(
                reason=f"runs on a simulated board only; --harness-station {choice.path} is real hardware "
                       f"(station {choice.station.id}, backend {choice.station.backend})"))


def pytest_terminal_summary(terminalreporter, exitstatus, config):
    results = config.stash.get(_RESULTS, [])
    if not results:
        return
    tr = terminalreporter
    tr.section("harness compliance results")
    for nodeid, r in results:
        m = r.worst_margin_db
        margin = "" if m is None else f", worst margin {m:+.3f} dB"
        tr.write_line(f"{r.verdict.upper():<12} {r.unit} vs {r.profile.get('id')}{margin}  [{nodeid}]")
        if r.certificate_path:
            tr.write_line(f"{'':<12} {r.certificate_path}")


# --------------------------------------------------------------------------------------
# fixtures
# --------------------------------------------------------------------------------------
@pytest.fixture(scope="session")
def filter_station(pytestconfig) -> StationChoice:
    """Which station this session measures on: the ``--harness-station`` file, or the
    built-in simulated station (``.given``, ``.hardware``, ``.station``, ``.path``,
    ``.for_profile(profile)``)."""
    return _choice(pytestconfig)


@pytest.fixture
def simulated_board(request):
    """Factory of simulated boards: ``simulated_board(source, *, imperfections=None,
    quantize=None, sample_rate_hz=None, id=None, model=None, firmware=None)`` or
    ``simulated_board(sos=..., sample_rate_hz=...)``, ``(b=..., a=...)``,
    ``(z=..., p=..., k=...)``. `source` is a coefficient file (.json/.csv/.npz), a device
    model file (.toml), a filter dict, a FilterDesign or a DeviceModel; relative paths
    are looked up beside the test file first. Returns a harness.device.DeviceModel.
    A bad file fails the test with the file, the key and the problem."""
    base = Path(request.path).parent

    def make(source=None, **kwargs):
        from harness.pytest_compliance import clear_errors

        kwargs.setdefault("base_dir", base)
        with clear_errors("harness: cannot build the simulated board"):
            return make_board(source, **kwargs)

    return make


@pytest.fixture
def compliance(request, filter_station, tmp_path) -> ComplianceSession:
    """A ComplianceSession for this test: ``compliance.measure(profile, board=...)``,
    ``compliance.check_design(profile, coeffs, quantize=...)``, ``compliance.profile(path)``.
    Records go into ``tmp_path / 'harness'`` (or ``--harness-out DIR / <test>``); every
    result is attached to the JUnit XML report as ``harness_*`` properties."""
    config = request.config
    out = config.getoption("harness_out", None)
    if out:
        out_dir = Path(config.invocation_params.dir) / out / _safe(request.node.nodeid.replace("::", "-"), 120)
    else:
        out_dir = tmp_path / "harness"
    node = request.node
    results = config.stash.get(_RESULTS, [])

    def record(name, value):
        node.user_properties.append((name, value))

    return ComplianceSession(filter_station, out_dir, base_dir=Path(request.path).parent,
                             serial=config.getoption("harness_serial", None), record=record,
                             on_result=lambda r: results.append((node.nodeid, r)))
