"""Benchmarks of the measurement engine (not part of the normal test run).

Run from the repository root::

    .venv/bin/python -m tests.benchmarks            # full run (a few minutes)
    .venv/bin/python -m tests.benchmarks --quick    # smoke-sized run (under a minute)
    .venv/bin/python -m tests.benchmarks --json bench.json

Each module measures one thing and has a ``run(**settings) -> dict`` returning
``rows`` (`common.Row`: measured figure, reference figure, ratio, target) and
``results`` (every figure, JSON-friendly):

1. `crb` - estimator efficiency against the Cramer-Rao bound (sine_fit_3 and the
   multitone estimator per tone) at SNR 20..80 dB.
2. `coverage` - coverage of the 95 % expanded intervals of the full analysis over
   seeded simulated captures (JCGM 100), with the mean k and effective dof.
3. `duration` - the shortest stimulus reaching U <= 0.05 dB at every point of a
   12-points-per-decade grid, multitone vs stepped sine, found by running them.
4. `h1` - accuracy against the textbook H1 = Pxy / Pxx (scipy.signal.csd / welch) on the
   same captures.
5. `speed` - analysis time and peak memory for a 10 s two-channel 96 kS/s capture.
6. `store` - results-store throughput (units of 100 points recorded per second, SQLite
   and, when HARNESS_TEST_PG_URL names a server, PostgreSQL) and `harness stats` time
   on 100,000 stored units.

Every figure is computed in the run that prints it; nothing is stored or hard-coded.
"""

MODULES = ("crb", "coverage", "duration", "h1", "speed", "store")
