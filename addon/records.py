"""What Overtone wrote on a target, and the one rule every re-run follows.

The operators and the batch handler both go through :mod:`.runs`, which asks
this module three things:

- which vertex groups pair up as landmarks (:func:`landmark_names`): a source
  group whose name the target also has, when the target's group holds weights
  and Overtone did not write it. A target group Overtone wrote is a result to
  refresh, and an empty one (what parenting with empty groups leaves) is a
  place to fill: neither pins the match. With Replace Existing no group pins
  it: the target's groups of the source's names are overwritten like any layer;
- under which name each result goes (:func:`names_for`): a result Overtone
  wrote before from the same source, and signal, is refreshed in place (a
  detail shape key is replaced, never stacked); Overtone's own layers
  (confidence, uncertain vertices) are always refreshed; empty target groups
  of the source's names are filled; everything else the target has is kept
  unless Replace Existing is on. Asked to keep earlier results, a re-run
  writes new layers beside them and a new shape key at value 0;
- what to record after writing (:func:`record`): the custom property
  :data:`WRITTEN_PROPERTY` on the target, a JSON object
  ``{"layers": {name: [source, signal]}, "shapes": {name: [source, signal]}}``.

The property is plain JSON text so it survives saving, linking and copying the
object, and anyone can read it in the custom properties panel.
"""

from __future__ import annotations

import json
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field
from typing import Any

import bpy

from . import bridge

__all__ = ["WRITTEN_PROPERTY", "CONFIDENCE_NAME", "UNCERTAIN_NAME", "DETAIL_NAME", "OWN_LAYERS",
           "Written", "written_on", "landmark_names", "Naming", "names_for", "record"]

WRITTEN_PROPERTY = "overtone_written"
_OLD_PROPERTY = "overtone_results"  # earlier versions: a list of layer names, sources unknown
CONFIDENCE_NAME = "overtone_confidence"
UNCERTAIN_NAME = "overtone_uncertain"
DETAIL_NAME = "overtone_detail"
OWN_LAYERS = (CONFIDENCE_NAME, UNCERTAIN_NAME)
"""Layers that only Overtone writes: refreshed by every run, never suffixed."""


@dataclass
class Written:
    """What Overtone wrote on one target: name -> (source object, signal)."""

    layers: dict[str, tuple[str, str]] = field(default_factory=dict)
    shapes: dict[str, tuple[str, str]] = field(default_factory=dict)

    def earlier(self, source: str, signal: str, shape: bool) -> str | None:
        """The name written last time from ``source``'s ``signal``, if any."""
        table = self.shapes if shape else self.layers
        for name, origin in table.items():
            if origin == (source, signal):
                return name
        return None


def _pairs(table: Any) -> dict[str, tuple[str, str]]:
    if not isinstance(table, dict):
        return {}
    return {str(k): (str(v[0]), str(v[1])) for k, v in table.items()
            if isinstance(v, list) and len(v) == 2}


def written_on(target: bpy.types.Object) -> Written:
    """The record on ``target`` (empty when there is none or it is unreadable)."""
    text = target.get(WRITTEN_PROPERTY)
    found = Written()
    if isinstance(text, str):
        try:
            data = json.loads(text)
        except ValueError:
            data = {}
        if isinstance(data, dict):
            found = Written(_pairs(data.get("layers")), _pairs(data.get("shapes")))
    old = target.get(_OLD_PROPERTY)
    if old is not None and not isinstance(old, str):
        for name in list(old):
            found.layers.setdefault(str(name), ("", str(name)))
    return found


def landmark_names(source: bpy.types.Object, target: bpy.types.Object, *,
                   evaluated: bool = False, replace_existing: bool = False) -> list[str]:
    """Source vertex groups that pair up with the target's as landmarks (module docstring).
    None with ``replace_existing``: the target's groups of the source's names are then
    results to overwrite."""
    if replace_existing:
        return []
    ours = written_on(target).layers
    candidates = [g.name for g in source.vertex_groups
                  if g.name in target.vertex_groups and g.name not in ours]
    if not candidates:
        return []
    weights = bridge.read_vertex_groups(target, candidates)
    return [name for name in candidates if float(weights[name].max(initial=0.0)) > 0.0]


def _empty_groups(target: bpy.types.Object, names: Iterable[str]) -> set[str]:
    wanted = [n for n in names if n in target.vertex_groups]
    if not wanted:
        return set()
    weights = bridge.read_vertex_groups(target, wanted)
    return {n for n in wanted if float(weights[n].max(initial=0.0)) == 0.0}


@dataclass(frozen=True)
class Naming:
    """Where a run's results go: result name -> name to write under, the
    names that may be replaced, and the value of a new shape key."""

    names: dict[str, str]
    refresh: frozenset[str]
    key_value: float = 1.0


def names_for(target: bpy.types.Object, source: str, results: Sequence[str], *, shape: bool = False,
              keep_earlier: bool = False, replace_existing: bool = False) -> Naming:
    """Apply the re-run rule to results called ``results`` (layers, or shape keys with
    ``shape``). With ``replace_existing`` each result goes under its own name,
    replacing whatever the target has there."""
    written = written_on(target)
    names: dict[str, str] = {}
    refresh: set[str] = set()
    earlier_any = False
    for result in results:
        earlier = written.earlier(source, result, shape)
        earlier_any = earlier_any or earlier is not None
        if result in OWN_LAYERS and not shape:
            names[result] = result
            refresh.add(result)
        elif earlier is not None and not keep_earlier and not replace_existing:
            names[result] = earlier
            refresh.add(earlier)
        else:
            names[result] = result
    if not shape:
        refresh |= _empty_groups(target, [n for n in results if n not in OWN_LAYERS])
    return Naming(names, frozenset(refresh), 0.0 if (shape and keep_earlier and earlier_any) else 1.0)


def record(target: bpy.types.Object, source: str, written: dict[str, str], *, shape: bool = False) -> None:
    """Add ``written`` (result -> name it got) to the record on ``target``;
    forget names the target no longer has."""
    now = written_on(target)
    layers, shapes = bridge.layer_names(target)
    table = now.shapes if shape else now.layers
    for result, name in written.items():
        table[name] = (source, result)
    data = {"layers": {k: list(v) for k, v in now.layers.items() if k in layers},
            "shapes": {k: list(v) for k, v in now.shapes.items() if k in shapes}}
    target[WRITTEN_PROPERTY] = json.dumps(data, sort_keys=True)
    if target.get(_OLD_PROPERTY) is not None:
        del target[_OLD_PROPERTY]
