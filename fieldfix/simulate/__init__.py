"""Acquisition simulators with known ground truth: gradient-echo field-map echoes and EPI.

The submodules hold the simulators (``gradient_echo`` and ``epi``); they are used by the
tests, the sample scenarios and by users who want to see what a protocol will do.
"""
