"""Error types and the exit codes the command line maps them to (DESIGN.md).

Exit codes: 0 pass, 1 fail, 3 inconclusive, 4 invalid measurement or hardware
fault, 2 usage or configuration error.
"""

from __future__ import annotations

EXIT_PASS = 0
EXIT_FAIL = 1
EXIT_USAGE = 2
EXIT_INCONCLUSIVE = 3
EXIT_INVALID = 4

VERDICT_EXIT = {
    "pass": EXIT_PASS,
    "fail": EXIT_FAIL,
    "inconclusive": EXIT_INCONCLUSIVE,
    "invalid": EXIT_INVALID,
}


class HarnessError(Exception):
    """Base of every error the harness reports to a user without a traceback."""

    exit_code = EXIT_USAGE


class ConfigError(HarnessError):
    """A bad input file or value: names the file, the key path and the problem.

    Parameters
    ----------
    file : str or None
        The file the bad value came from (None for values given in code).
    key : str or None
        Key path inside the file, for example ``band[2].stop_hz``.
    problem : str
        What is wrong, in words a user can act on.
    """

    exit_code = EXIT_USAGE

    def __init__(self, file: str | None, key: str | None, problem: str):
        self.file = None if file is None else str(file)
        self.key = key
        self.problem = problem
        super().__init__(self.message)

    @property
    def message(self) -> str:
        where = []
        if self.file:
            where.append(self.file)
        if self.key:
            where.append(self.key)
        prefix = ": ".join(where)
        return f"{prefix}: {self.problem}" if prefix else self.problem


class LevelLimitError(HarnessError):
    """A stimulus would exceed the station's maximum output level; nothing was played."""

    exit_code = EXIT_USAGE


class InvalidMeasurement(HarnessError):
    """The measurement cannot support a verdict (no signal, clipping, dropout, noise,
    timeout, expired calibration, hardware fault). Never turned into a pass."""

    exit_code = EXIT_INVALID

    def __init__(self, reason: str):
        self.reason = reason
        super().__init__(reason)
