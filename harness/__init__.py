"""Filter compliance test harness.

Proves, unit by unit, that filter hardware meets a frequency-response tolerance
mask: stimulus generation, playback and capture, magnitude and phase estimation
with GUM uncertainty, a stated decision rule, and a certificate per serial number.
"""

__version__ = "0.1.0"
SOFTWARE_NAME = "harness"
