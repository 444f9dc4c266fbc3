"""gripsight.vision.synth: the synthetic renderer (scenes, photos with truth files, the sample set).

Not on the product's path: calibration and detection never import it.
"""
