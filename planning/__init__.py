"""gripsight.planning: arm kinematics, motion, every-sample checks and pick planning.

A library: numpy only (no images, no OpenCV, no files, no command line). It takes the cell's settings
as plain objects and hands back plans; its errors are :class:`gripsight.planning.errors.PlanningError`.
"""
