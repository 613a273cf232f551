"""Overtone: carry vertex colours, attributes, weights and surface detail between meshes.

The add-on is thin: :mod:`.bridge` turns Blender meshes into arrays and back,
:mod:`.runs` and :mod:`.job` hand them to the bundled engine (``.engine``),
operators read settings and report, panels draw.
"""

from __future__ import annotations

from . import batch, operators, panels, preferences, properties

__all__ = ["register", "unregister"]

_MODULES = (properties, preferences, operators, panels, batch)


def register() -> None:
    for module in _MODULES:
        module.register()


def unregister() -> None:
    for module in reversed(_MODULES):
        module.unregister()
