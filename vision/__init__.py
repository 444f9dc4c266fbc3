"""gripsight.vision: markers, camera-to-table calibration, lens, parts, overlays.

A library that knows nothing about arms; it meets planning only in the application layer, through plain
data classes in table coordinates. Its errors are :class:`gripsight.vision.errors.VisionError`. The
synthetic renderer is :mod:`gripsight.vision.synth`.
"""
