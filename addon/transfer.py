"""One source/target pair: what to carry, checks, and the hook into the engine.

The operators and the batch runner both end in :func:`transfer_pair`.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, fields
from typing import Any

import bpy

from . import bridge

__all__ = ["PairRequest", "selected_pair", "check_pair", "transfer_pair"]


@dataclass(frozen=True)
class PairRequest:
    """Everything one transfer needs besides the two objects.

    Field names match ``OvertoneSettings`` and the batch job's ``settings``.
    """

    signals: tuple[str, ...] = ()
    detail: bool = False
    match_mode: str = "AUTO"
    basis: str = "ORTHOPRODUCTS"
    eigenfunctions: int = 60
    product_order: int = 2
    detail_strength: float = 1.0
    detail_band: int = 30
    as_shown: bool = False
    replace_existing: bool = False

    @classmethod
    def from_settings(cls, settings: Any, *, signals: Sequence[str] = (),
                      detail: bool = False) -> PairRequest:
        """Build from the scene settings (or anything with the same attributes)."""
        values = {f.name: getattr(settings, f.name) for f in fields(cls)
                  if f.name not in ("signals", "detail")}
        return cls(signals=tuple(signals), detail=detail, **values)


def selected_pair(context: bpy.types.Context
                  ) -> tuple[bpy.types.Object | None, bpy.types.Object | None]:
    """(source, target) from the selection: the active mesh is the target, the
    one other selected mesh the source; None where that is not the case."""
    active = context.active_object
    target = active if active is not None and active.type == 'MESH' else None
    others = [o for o in context.selected_objects if o.type == 'MESH' and o != target]
    return (others[0] if len(others) == 1 else None), target


def check_pair(source: bpy.types.Object | None, target: bpy.types.Object | None,
               request: PairRequest) -> list[bridge.Signal]:
    """Check a pair before any work; return the source signals to carry.

    Raises
    ------
    ValueError
        Naming what is missing or wrong.
    """
    if source is None or target is None:
        raise ValueError("select two meshes: the source, then the target (active)")
    for role, obj in (("source", source), ("target", target)):
        if obj.type != 'MESH':
            raise ValueError(f"{role} {obj.name!r} is not a mesh (type {obj.type})")
    if source == target:
        raise ValueError(f"source and target are the same object {source.name!r}")
    available = {s.name: s for s in bridge.list_signals(source, evaluated=request.as_shown)}
    missing = [name for name in request.signals if name not in available]
    if missing:
        raise ValueError(f"source {source.name!r} has no signal {', '.join(map(repr, missing))}"
                         f" (it has {', '.join(map(repr, available)) or 'none'})")
    if not request.signals and not request.detail:
        raise ValueError("nothing to carry: tick at least one signal")
    return [available[name] for name in request.signals]


def transfer_pair(source: bpy.types.Object, target: bpy.types.Object,
                  request: PairRequest) -> dict[str, Any]:
    """Carry the requested signals (and detail) from ``source`` to ``target``.

    Returns a JSON-able report. The engine's transfer API has not landed yet:
    this is the one place that will call it.

    Raises
    ------
    NotImplementedError
        Always, for now.
    """
    check_pair(source, target, request)
    raise NotImplementedError("transfer engine not wired yet")
