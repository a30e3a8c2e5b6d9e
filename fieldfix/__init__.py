"""fieldfix: B0 field maps, EPI distortion correction and susceptibility-dropout prediction."""

__version__ = "0.1.0"
