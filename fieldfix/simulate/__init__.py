"""Acquisition simulators with known ground truth: gradient-echo field-map echoes and EPI.

:func:`simulate_gradient_echo` (module ``gradient_echo``) makes dual- or multi-echo
magnitude and phase data for a known B0 map; :func:`simulate_epi` and
:func:`simulate_epi_run` (module ``epi``) acquire k-space line by line, each line at its own
time with the off-resonance phase it accrues, and reconstruct by Fourier transform, so that
both distortion and dropout appear. They are used by the tests, the sample scenarios and by
users who want to see what a protocol will do.
"""

from .epi import simulate_epi, simulate_epi_run
from .gradient_echo import simulate_gradient_echo

__all__ = ["simulate_gradient_echo", "simulate_epi", "simulate_epi_run"]
