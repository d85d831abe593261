"""Command-line verbs of the audio path: ``harness audio devices``, ``harness audio check``
(and ``harness golden store``, see `harness.golden`).

``harness audio devices`` lists what PortAudio sees: index, input and output channels,
default sample rate, host API and name; a station's ``[station.audio].device`` takes a
part of the name (with ``host_api`` when the same interface appears under several host
APIs) or the index. ``harness audio check --station FILE`` resolves the station's device,
channel map and sample rate exactly as a measurement would and prints them, without
opening a stream or playing anything.
"""

from __future__ import annotations

from harness.errors import EXIT_PASS


def _cmd_devices(args) -> int:
    from harness.backends.audio import list_devices

    devices = list_devices()
    if not devices:
        print("PortAudio finds no audio device (is the interface plugged in and its driver loaded?)")
        return EXIT_PASS
    print(f"{'index':>5} {'in':>4} {'out':>4} {'default Hz':>11}  {'host API':<28} name")
    for d in devices:
        print(f"{d['index']:>5} {d['inputs']:>4} {d['outputs']:>4} {d['default_rate_hz']:>11g}  "
              f"{d['host_api']:<28} {d['name']}")
    print("In a station file: [station.audio] device = \"<part of the name>\" (or the index), host_api = \"...\" "
          "when a name appears under several host APIs; channels count from 1.")
    return EXIT_PASS


def _cmd_check(args) -> int:
    from harness.backends.audio import open_backend
    from harness.errors import ConfigError
    from harness.station import load_station

    station = load_station(args.station)
    if station.backend != "audio":
        raise ConfigError(station.path, "station.backend", f"is '{station.backend}', not 'audio'")
    backend = open_backend(station)
    try:
        ident = backend.identity()
    finally:
        backend.close()
    c = backend.config
    print(f"station {station.id}: device [{ident['device_index']}] '{ident['device']}' ({ident['host_api']})")
    print(f"  {station.sample_rate_hz:g} Hz, stimulus on output {c.stimulus_output}, response on input "
          f"{c.response_input}, " + (f"reference on input {c.reference_input}" if station.reference_channel
                                    else "no reference input (chain calibration divided out)"))
    volts = ""
    if station.full_scale_volts:
        volts = f" = {station.full_scale_volts * 10 ** (station.max_output_dbfs / 20):.4g} V peak"
    print(f"  maximum output {station.max_output_dbfs:.2f} dBFS{volts}; pilot {min(c.pilot_dbfs, station.max_output_dbfs):.1f} dBFS")
    print(f"  {ident['portaudio']}")
    print("station OK (nothing was played)")
    return EXIT_PASS


def register(sub) -> None:
    """Add ``audio devices``, ``audio check`` and ``golden store`` to the command line."""
    a = sub.add_parser("audio", help="audio interfaces: list devices, check an audio station (plays nothing)")
    asub = a.add_subparsers(dest="audio_verb", metavar="ACTION")
    d = asub.add_parser("devices", help="list PortAudio devices with their channel counts and default rates")
    d.set_defaults(func=_cmd_devices)
    c = asub.add_parser("check", help="resolve an audio station's device, channel map and sample rate")
    c.add_argument("--station", required=True, help="station TOML file (backend = \"audio\")")
    c.set_defaults(func=_cmd_check)

    from harness.golden import register as register_golden

    register_golden(sub)
