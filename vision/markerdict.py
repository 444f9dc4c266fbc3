"""The marker dictionaries a cell may name: every dictionary OpenCV predefines, by our lower-case name.

A name is ``aruco_<n>x<n>_<count>`` for the ArUco sets, ``aruco_original``, ``aruco_mip_36h12``, or
``apriltag_<family>`` for the AprilTag sets; each maps to its ``cv2.aruco.DICT_*`` constant. OpenCV is
imported only when a dictionary is used, so the cell schema can list the names without loading it.
"""

from __future__ import annotations

import functools

from gripsight.vision.errors import VisionError

__all__ = ["DICTIONARY_NAMES", "MarkerDictionaryError", "aruco_dictionary", "dictionary_size", "cells_per_side"]

# our name -> OpenCV's constant name (the whole predefined set of OpenCV 4.7+)
_OPENCV_NAMES = {
    **{f"aruco_{n}x{n}_{count}": f"DICT_{n}X{n}_{count}" for n in (4, 5, 6, 7) for count in (50, 100, 250, 1000)},
    "aruco_original": "DICT_ARUCO_ORIGINAL",
    "aruco_mip_36h12": "DICT_ARUCO_MIP_36h12",
    "apriltag_16h5": "DICT_APRILTAG_16h5",
    "apriltag_25h9": "DICT_APRILTAG_25h9",
    "apriltag_36h10": "DICT_APRILTAG_36h10",
    "apriltag_36h11": "DICT_APRILTAG_36h11",
}
DICTIONARY_NAMES: tuple[str, ...] = tuple(_OPENCV_NAMES)
# how many ids each holds, as OpenCV defines them (written out so a cell check needs no OpenCV import;
# tests/vision/test_markers.py checks it against OpenCV)
_SIZES = {**{f"aruco_{n}x{n}_{count}": count for n in (4, 5, 6, 7) for count in (50, 100, 250, 1000)},
          "aruco_original": 1024, "aruco_mip_36h12": 250, "apriltag_16h5": 30, "apriltag_25h9": 35,
          "apriltag_36h10": 2320, "apriltag_36h11": 587}


class MarkerDictionaryError(VisionError):
    """A dictionary name that is not one of :data:`DICTIONARY_NAMES`."""


def _constant(name: str) -> int:
    import cv2

    key = _OPENCV_NAMES.get(name)
    if key is None:
        raise MarkerDictionaryError(f"unknown marker dictionary {name!r}; use one of: {', '.join(DICTIONARY_NAMES)}")
    value = getattr(cv2.aruco, key, None)
    if value is None:                     # older spellings: DICT_APRILTAG_36H11
        value = getattr(cv2.aruco, key.upper(), None)
    if value is None:
        raise MarkerDictionaryError(f"marker dictionary {name!r} is not in this OpenCV ({cv2.__version__}); "
                                    f"install opencv-python 4.7 or later")
    return int(value)


@functools.lru_cache(maxsize=32)
def aruco_dictionary(name: str):
    """OpenCV's predefined dictionary for a cell-file name such as ``aruco_4x4_50`` or ``apriltag_36h11``.

    Raises
    ------
    MarkerDictionaryError
        For a name that is not one of :data:`DICTIONARY_NAMES` (the message lists them).
    """
    import cv2

    return cv2.aruco.getPredefinedDictionary(_constant(name))


def dictionary_size(name: str) -> int:
    """How many ids the dictionary holds (ids 0 to size - 1)."""
    if name not in _SIZES:
        _constant(name)                   # raises the one-line error listing the names
    return _SIZES[name]


def cells_per_side(name: str) -> int:
    """Cells across a marker of the dictionary, its one-cell black border included."""
    return int(aruco_dictionary(name).markerSize) + 2
