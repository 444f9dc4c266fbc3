"""gripsight planning: cell file, arm kinematics, motion, checks and outputs (no images, no OpenCV)."""
