"""Add-on preferences: where the eigenbasis cache lives and how big it may grow."""

from __future__ import annotations

from pathlib import Path
from typing import cast

import bpy
from bpy.props import IntProperty, StringProperty

__all__ = ["OvertonePreferences", "preferences_of", "cache_folder",
           "register", "unregister"]

_PACKAGE = __package__ or "overtone"


def _default_cache() -> str:
    try:
        return bpy.utils.extension_path_user(_PACKAGE, path="cache", create=True)
    except (ValueError, RuntimeError, OSError):
        return ""  # not running as an installed extension: resolved later


class OvertonePreferences(bpy.types.AddonPreferences):
    bl_idname = _PACKAGE

    cache_folder: StringProperty(  # type: ignore[valid-type]
        name="Cache Folder", subtype='DIR_PATH', default=_default_cache(),
        description="Where eigenbases and correspondences are kept between runs")
    cache_limit_mb: IntProperty(  # type: ignore[valid-type]
        name="Cache Size Limit (MB)", default=2048, min=16, soft_max=65536,
        description="Oldest cache files are dropped beyond this size")

    def draw(self, context: bpy.types.Context) -> None:
        layout = self.layout
        layout.prop(self, "cache_folder")
        layout.prop(self, "cache_limit_mb")
        layout.operator("overtone.clear_cache", icon='TRASH')


def preferences_of(context: bpy.types.Context) -> OvertonePreferences:
    """This add-on's preferences."""
    prefs = context.preferences
    if prefs is None:
        raise ValueError("no preferences in this context")
    return cast(OvertonePreferences, prefs.addons[_PACKAGE].preferences)


def cache_folder(context: bpy.types.Context) -> Path:
    """The cache folder from the preferences (the per-user default when empty)."""
    chosen = preferences_of(context).cache_folder
    folder = bpy.path.abspath(chosen) if chosen else _default_cache()
    if not folder:
        raise ValueError("no cache folder: set one in the Overtone preferences")
    return Path(folder)


register, unregister = bpy.utils.register_classes_factory(  # type: ignore[func-returns-value, misc]
    (OvertonePreferences,))
