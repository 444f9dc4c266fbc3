"""gripsight vision: markers, camera-to-table calibration, lens, parts, overlays, synthetic photos.

Knows nothing about arms; meets the planning side through plain data classes in table coordinates.
"""
