"""Which names are camera names: shared by the frame listing, the store and the config.

A camera is a folder directly under the scanned folder, and its baselines live in a folder of
the same name in the store. So a camera name is a folder name that the frame listing reads:
not empty, no path separator, not hidden (``.`` or ``~`` first, which also excludes ``.`` and
``..``) and not the name of a download still being written (``.part``, ``.tmp``, ...).
"""

from __future__ import annotations

#: Name endings of files still being downloaded or copied (never frames yet).
PARTIAL_SUFFIXES = (".part", ".tmp", ".partial", ".crdownload")

#: What a camera name may be, in words (for error messages).
CAMERA_NAME_RULE = ("a camera name is a folder name: not empty, no '/' or '\\', not starting "
                    "with '.' or '~', not ending in " + ", ".join(PARTIAL_SUFFIXES))


def is_ignored_name(name: str) -> bool:
    """True for hidden files and names of downloads still being written (never frames yet)."""
    low = name.lower()
    return name.startswith((".", "~")) or low.endswith(PARTIAL_SUFFIXES)


def is_camera_name(name: str) -> bool:
    """True if ``name`` can be a camera folder (see the module docstring)."""
    return (bool(name) and not any(c in name for c in "/\\\x00")
            and not is_ignored_name(name))
