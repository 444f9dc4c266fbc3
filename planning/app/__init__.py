"""gripsight.app: the application layer on top of the two libraries.

The command line, the cell-file schema, the photo-to-plan pipeline, outputs and plots, run, batch and
report live here. It alone imports both :mod:`gripsight.vision` and :mod:`gripsight.planning`, and it
alone turns their typed errors into one-line messages and exit codes.
"""
