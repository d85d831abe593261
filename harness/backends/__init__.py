"""Device backends: one small interface (`harness.backends.base.Backend`) that the
simulated board, the audio interface and the lab-instrument paths implement."""
