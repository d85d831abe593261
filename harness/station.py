"""Station files (TOML): which backend, its sample rate, the maximum output level,
the Type B contributions of the chain and the calibration it relies on.

Relative paths in a station file (device model, calibration file, output folder) are
taken relative to the folder of the station file itself.
"""

from __future__ import annotations

import importlib
import importlib.util
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from harness.config import Table, load_toml, sha256_hex
from harness.errors import ConfigError
from harness.uncertainty import TypeB

BACKENDS = ("simulated", "audio", "visa")
_TOP_KEYS = ("station", "calibration", "line", "database", "signing")
_STATION_KEYS = ("id", "backend", "device_model", "sample_rate_hz", "reference_channel",
                 "max_output_dbfs", "type_b", "chain_latency_samples", "output_dir",
                 "description", "seed", "min_snr_db", "max_latency_samples",
                 "audio", "visa", "control", "full_scale_volts", "max_output_volts")

# Optional sections read by the module that uses them: (where, key) -> module with
# ``parse_config(table: Table, *, base_dir: Path, station_id: str, backend: str)``.
SECTION_MODULES = {
    ("station", "audio"): "harness.backends.audio",
    ("station", "visa"): "harness.backends.visa",
    ("station", "control"): "harness.control",
    ("top", "line"): "harness.line",
    ("top", "database"): "harness.store",
    ("top", "signing"): "harness.signing",
}
_TYPE_B_KEYS = ("level_db", "flatness_db", "phase_deg")
_CAL_KEYS = ("file", "valid_days")


@dataclass(frozen=True)
class CalibrationConfig:
    file: Path | None = None
    valid_days: int = 30


@dataclass(frozen=True)
class Station:
    """A validated station file.

    Attributes
    ----------
    max_output_dbfs : float
        Nothing above this peak level is ever played (safety and hardware limit).
    min_snr_db : float
        Points with a lower signal-to-noise ratio are not measured properly
        (pass-band points become invalid; stop-band points are judged on a bound).
    max_latency_samples : int
        How much stream and device latency the capture allows for.
    """

    id: str
    backend: str
    sample_rate_hz: float
    max_output_dbfs: float
    reference_channel: bool = True
    device_model: Path | None = None
    chain_latency_samples: int = 0
    type_b: TypeB = field(default_factory=TypeB)
    calibration: CalibrationConfig = field(default_factory=CalibrationConfig)
    output_dir: Path | None = None
    description: str = ""
    seed: int | None = None
    min_snr_db: float = 20.0
    max_latency_samples: int = 4096
    path: str | None = None
    sha256: str | None = None
    full_scale_volts: float | None = None
    sections: dict[str, Any] = field(default_factory=dict)   # parsed optional sections by name

    def section(self, name: str) -> Any:
        """A parsed optional section (``audio``, ``visa``, ``control``, ``line``,
        ``database``, ``signing``) or None."""
        return self.sections.get(name)


def _resolve(base: Path, value: str) -> Path:
    p = Path(value)
    return p if p.is_absolute() else (base / p)


def load_station(path: str | Path) -> Station:
    """Load and validate a station file; raises ConfigError naming file, key, problem."""
    data, raw = load_toml(path)
    file = str(path)
    base = Path(path).resolve().parent
    top = Table(data, file)
    top.check_known(_TOP_KEYS)
    st = top.table("station")
    st.check_known(_STATION_KEYS)
    sid = st.str("id")
    if not sid.strip():
        raise st.error("id", "must not be empty")
    backend = st.str("backend", choices=BACKENDS)
    fs = st.float("sample_rate_hz", min=1000.0)
    ref = st.bool("reference_channel", True)
    max_out = st.float("max_output_dbfs", max=0.0)
    if max_out < -120:
        raise st.error("max_output_dbfs", f"{max_out:g} dBFS leaves nothing to measure with")
    fs_volts = st.float("full_scale_volts", None, min=0.0, min_exclusive=True)
    max_volts = st.float("max_output_volts", None, min=0.0, min_exclusive=True)
    if max_volts is not None:
        if fs_volts is None:
            raise st.error("max_output_volts", "needs full_scale_volts (the interface's output at 0 dBFS, volts peak)")
        import math

        # the tighter of the two limits applies: volts peak -> dBFS peak
        max_out = min(max_out, 20.0 * math.log10(max_volts / fs_volts))
    model = st.str("device_model", None)
    device_model = None
    if backend == "simulated":
        if model is None:
            raise st.error("device_model", "missing key (a simulated station needs the device model it simulates)")
        device_model = _resolve(base, model)
        if not device_model.is_file():
            raise st.error("device_model", f"file not found: {device_model}")
    elif model is not None:
        raise st.error("device_model", f"only a simulated station takes a device model (backend is '{backend}')")
    chain_latency = st.int("chain_latency_samples", 0, min=0, max=1_000_000)
    out_dir = st.str("output_dir", None)
    seed = st.int("seed", None, min=0)
    min_snr = st.float("min_snr_db", 20.0, min=0.0, max=200.0)
    max_lat = st.int("max_latency_samples", 4096, min=0, max=10_000_000)
    tb = st.table("type_b", None)
    type_b = TypeB()
    if tb is not None:
        tb.check_known(_TYPE_B_KEYS)
        type_b = TypeB(level_db=tb.float("level_db", 0.0, min=0.0),
                       flatness_db=tb.float("flatness_db", 0.0, min=0.0),
                       phase_deg=tb.float("phase_deg", 0.0, min=0.0))
    cal = CalibrationConfig()
    ct = top.table("calibration", None)
    if ct is not None:
        ct.check_known(_CAL_KEYS)
        cal_file = ct.str("file", None)
        cal = CalibrationConfig(file=None if cal_file is None else _resolve(base, cal_file),
                                valid_days=ct.int("valid_days", 30, min=1, max=3650))
    sections = {}
    for (where, name), module in SECTION_MODULES.items():
        holder = st if where == "station" else top
        if not holder.has(name):
            continue
        if importlib.util.find_spec(module) is None:
            raise holder.error(name, f"this version of the harness does not support [{holder.key(name)}]")
        table = holder.table(name)
        sections[name] = importlib.import_module(module).parse_config(table, base_dir=base, station_id=sid,
                                                                      backend=backend)
    if not ref and cal.file is None:
        raise ConfigError(file, "calibration.file", "missing key (a station without a reference channel "
                                                    "divides by a chain calibration and must name its file)")
    return Station(id=sid, backend=backend, sample_rate_hz=fs, max_output_dbfs=max_out,
                   reference_channel=ref, device_model=device_model, chain_latency_samples=chain_latency,
                   type_b=type_b, calibration=cal,
                   output_dir=None if out_dir is None else _resolve(base, out_dir),
                   description=st.str("description", ""), seed=seed, min_snr_db=min_snr,
                   max_latency_samples=max_lat, path=file, sha256=sha256_hex(raw),
                   full_scale_volts=fs_volts, sections=sections)
