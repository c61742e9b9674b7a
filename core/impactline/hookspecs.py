"""Every hook an impactline plugin can implement, in one place.

A plugin is any module or object with functions marked ``@impactline.hookimpl``. It is found through the
entry-point group ``impactline.plugins`` (bundled plugins included) or named as a local ``.py`` file in a
pipeline file. pluggy checks each implementation's signature when it registers.
"""

from __future__ import annotations

import pluggy

PROJECT = "impactline"
#: Entry-point group scanned for plugins.
ENTRY_POINT_GROUP = "impactline.plugins"

hookspec = pluggy.HookspecMarker(PROJECT)
hookimpl = pluggy.HookimplMarker(PROJECT)


@hookspec
def impactline_stages() -> list[type]:
    """Return the stage classes this plugin provides (subclasses of the kinds in :mod:`impactline.stages`)."""
