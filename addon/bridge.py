"""The one place where Overtone touches Blender mesh data.

Reads a mesh object into the engine's own types (:class:`engine.MeshData`:
world-space positions, polygons as corners and sizes; :class:`engine.Signal`:
the per-vertex or per-corner layers it carries) and writes signals back as
colour attributes, generic attributes, vertex groups and shape keys. A
:class:`Layer` names where a signal lives on a mesh before its values are read.

Conventions
-----------
- Positions are world space, ``(n, 3)`` float64 (``obj.matrix_world`` applied).
- Colours travel as linear RGBA, ``(m, 4)`` float32, read and written through
  Blender's ``color`` property: a ``FLOAT_COLOR`` attribute stores them as they
  are, a ``BYTE_COLOR`` attribute stores 8-bit sRGB (linear 0.5 -> 188/255;
  alpha is not converted).
- ``m`` is the vertex count for the ``POINT`` domain and the corner count for
  ``CORNER``. Corner signals keep their seams: see ``engine/carrying/corners.py``.

Naming policy for results
-------------------------
A result takes its source's name. When the target already has a layer of that
name (colour or generic attribute, or vertex group: Blender keeps these in one
name space) or a shape key of that name, the result is written under
``<name>_ot<k>`` with the smallest free ``k >= 1``, unless ``replace=True``, in
which case the old layer is removed once every result of the call has been
written. Layers Blender needs (``position``, internal ``.``-names, UV maps) are
never replaced.

All-or-nothing
--------------
:func:`write_outputs` validates every array before it touches the mesh, and if
anything fails while writing it removes whatever it added, so the target is as
it was before the call.
"""

from __future__ import annotations

from collections.abc import Callable, Collection, Iterator, Sequence
from contextlib import contextmanager
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any, Literal, cast

import bmesh
import bpy
import numpy as np

from .engine import MeshData, Signal

if TYPE_CHECKING:
    from numpy.typing import NDArray

__all__ = [
    "Layer",
    "SUFFIX",
    "read_mesh",
    "list_layers",
    "read_signal",
    "read_vertex_groups",
    "uncarried_layers",
    "carryable",
    "not_carried_reason",
    "element_property",
    "name_limit",
    "shape_modifiers",
    "layer_names",
    "select_group",
    "confidence_output",
    "shape_key_output",
    "write_outputs",
]

Kind = Literal["color", "float", "vector", "weight", "label", "mask"]

SUFFIX = "_ot"
"""Results whose name is taken get ``<name>_ot1``, ``<name>_ot2``, ..."""

_LAYER_NAME_BYTES = 67   # attribute and UV map names (measured in bpy 5.0.1, docs/platform.md)
_GROUP_NAME_BYTES = 63   # vertex-group and shape-key names (same)
_COLOR_TYPES = ("BYTE_COLOR", "FLOAT_COLOR")
_GENERIC_KIND: dict[str, Kind] = {
    "FLOAT": "float", "FLOAT_VECTOR": "vector", "INT": "label", "BOOLEAN": "mask",
    "FLOAT2": "vector", "QUATERNION": "vector", "INT8": "label", "INT16_2D": "label",
    "INT32_2D": "label",
}
_CHANNELS = {"FLOAT": 0, "FLOAT_VECTOR": 3, "INT": 0, "BOOLEAN": 0, "BYTE_COLOR": 4,
             "FLOAT_COLOR": 4, "VERTEX_GROUP": 0, "SHAPE_KEY": 3, "FLOAT2": 2, "QUATERNION": 4,
             "INT8": 0, "INT16_2D": 2, "INT32_2D": 2}
_KIND_OF_TYPE: dict[str, Kind] = {**_GENERIC_KIND, "BYTE_COLOR": "color", "FLOAT_COLOR": "color",
                                  "VERTEX_GROUP": "weight", "SHAPE_KEY": "vector"}
_INT_RANGE: dict[str, tuple[int, int]] = {
    "INT": (-2**31, 2**31 - 1), "INT32_2D": (-2**31, 2**31 - 1), "INT8": (-128, 127),
    "INT16_2D": (-2**15, 2**15 - 1)}
_READ_DTYPE = {"FLOAT": np.float32, "FLOAT_VECTOR": np.float32, "FLOAT2": np.float32,
               "QUATERNION": np.float32, "BYTE_COLOR": np.float32, "FLOAT_COLOR": np.float32,
               "INT": np.int32, "INT8": np.int32, "INT16_2D": np.int32, "INT32_2D": np.int32,
               "BOOLEAN": np.bool_}
_CORNER_TYPES = ("BYTE_COLOR", "FLOAT_COLOR", "FLOAT", "FLOAT_VECTOR", "FLOAT2")
_FACE_SETS = ".sculpt_face_set"  # Blender's face sets: an INT face attribute (from memory)


@dataclass(frozen=True)
class Layer:
    """Where one per-vertex or per-corner signal lives on a mesh.

    Attributes
    ----------
    name : str
        The layer's name on the mesh (vertex group, attribute or shape key).
    domain : {"POINT", "CORNER"}
    data_type : str
        Blender's type: ``BYTE_COLOR``, ``FLOAT_COLOR``, ``FLOAT``,
        ``FLOAT_VECTOR``, ``INT``, ``BOOLEAN``, or ours, ``VERTEX_GROUP`` and
        ``SHAPE_KEY``.
    """

    name: str
    domain: str
    data_type: str

    @property
    def kind(self) -> Kind:
        """How the engine treats it: labels (integers) and masks (booleans) are never blended."""
        return _KIND_OF_TYPE[self.data_type]

    def signal(self, values: NDArray[Any]) -> Signal:
        """The engine signal holding ``values`` for this layer."""
        array = np.asarray(values)
        return Signal(self.name, self.kind, array, array.dtype, self.domain, self.data_type)


# --------------------------------------------------------------------------- reading


@contextmanager
def _mesh_of(obj: bpy.types.Object, evaluated: bool) -> Iterator[bpy.types.Mesh]:
    if obj.type != 'MESH':
        raise ValueError(f"object {obj.name!r} is not a mesh (type {obj.type})")
    if not evaluated:
        yield cast(bpy.types.Mesh, obj.data)
        return
    depsgraph = bpy.context.evaluated_depsgraph_get()
    shown = obj.evaluated_get(depsgraph)
    mesh = shown.to_mesh()
    try:
        yield mesh
    finally:
        shown.to_mesh_clear()


def _matrix(obj: bpy.types.Object) -> NDArray[np.float64]:
    """The object's world matrix as it is now. ``matrix_world`` is only brought
    up to date by a depsgraph evaluation: a script that sets ``scale`` or
    ``location`` and runs Overtone at once would otherwise be read with the old
    matrix, so the depsgraph is evaluated first (a no-op when nothing changed)."""
    bpy.context.evaluated_depsgraph_get()
    return np.array(cast("Sequence[Sequence[float]]", obj.matrix_world), dtype=np.float64)


def _elements(attr: bpy.types.Attribute) -> Any:
    """The element collection of any attribute (the stubs type it per subclass)."""
    return cast(Any, attr).data


def read_mesh(obj: bpy.types.Object, *, evaluated: bool = False, local: bool = False) -> MeshData:
    """Read a mesh object's geometry in world space (or its own, local, space).

    Parameters
    ----------
    obj : bpy.types.Object
        A mesh object.
    evaluated : bool
        Read the mesh as shown in the viewport (modifiers applied).
    local : bool
        Keep the mesh's own coordinates, ignoring where the object sits.

    Returns
    -------
    engine.MeshData
        ``vertices`` (n, 3) float64 in world space, ``corners`` (c,) int64
        (the vertex of each face corner, faces one after another), ``sizes``
        (f,) int64 (corners per face), ``tris`` (t, 3) int64 and
        ``tri_polygon`` (t,) int64: Blender's own triangles of the faces
        (``Mesh.loop_triangles``) and the face of each, so the engine prepares
        the mesh with the triangles Blender shows.
    """
    matrix = np.eye(4) if local else _matrix(obj)
    with _mesh_of(obj, evaluated) as mesh:
        n, c, f = len(mesh.vertices), len(mesh.loops), len(mesh.polygons)
        flat = np.empty(n * 3, dtype=np.float32)
        _elements(mesh.attributes["position"]).foreach_get("vector", flat)
        corner_verts = np.empty(c, dtype=np.int32)
        _elements(mesh.attributes[".corner_vert"]).foreach_get("value", corner_verts)
        sizes = np.empty(f, dtype=np.int32)
        mesh.polygons.foreach_get("loop_total", sizes)
        mesh.calc_loop_triangles()
        t = len(mesh.loop_triangles)
        tris = np.empty(t * 3, dtype=np.int32)
        mesh.loop_triangles.foreach_get("vertices", tris)
        tri_polygon = np.empty(t, dtype=np.int32)
        mesh.loop_triangles.foreach_get("polygon_index", tri_polygon)
    points = flat.reshape(n, 3).astype(np.float64)
    world = points @ matrix[:3, :3].T + matrix[:3, 3]
    return MeshData(np.ascontiguousarray(world), corner_verts.astype(np.int64), sizes.astype(np.int64),
                    tris=tris.reshape(t, 3).astype(np.int64), tri_polygon=tri_polygon.astype(np.int64))


def _is_user_layer(attr: bpy.types.Attribute) -> bool:
    return not (attr.name.startswith(".") or attr.is_internal or attr.is_required)


def element_property(data_type: str) -> str:
    """The property of an attribute's elements that holds its values."""
    if data_type in _COLOR_TYPES:
        return "color"
    return "vector" if data_type in ("FLOAT_VECTOR", "FLOAT2") else "value"


def carryable(domain: str, data_type: str) -> bool:
    """Whether Overtone carries a layer of this domain and type.

    Point layers of every numeric type; corner colours, floats, vectors and
    2D values (UV maps); face layers of every numeric type (never blended).
    Edges, text and matrices are not carried: :func:`not_carried_reason`.
    """
    if data_type in ("VERTEX_GROUP", "SHAPE_KEY"):
        return domain == "POINT"
    if data_type not in _CHANNELS:
        return False
    if domain == "CORNER":
        return data_type in _CORNER_TYPES
    return domain in ("POINT", "FACE")


def not_carried_reason(domain: str, data_type: str) -> str:
    """Why a layer of this domain and type is not carried, in an artist's words."""
    if domain == "EDGE":
        return ("edge layers (sharp edges, seams, creases) belong to the target's own edges, which "
                "do not run along the source's; carried UV maps get their seams along the target's "
                "faces (UV > Seams from Islands marks them)")
    if data_type == "STRING":
        return "text cannot be blended or located on another mesh"
    if data_type == "FLOAT4X4":
        return "blended matrices are no longer rotations and scales"
    if domain == "CORNER":
        return ("whole numbers, true/false values and rotations per face corner have no rule "
                "across different topologies")
    return f"{domain.lower()} layers of type {data_type} are not carried"


def _listed_attribute(attr: bpy.types.Attribute) -> bool:
    if attr.name == _FACE_SETS and attr.domain == "FACE":
        return True
    return _is_user_layer(attr)


def uncarried_layers(obj: bpy.types.Object, *, evaluated: bool = False) -> list[tuple[Layer, str]]:
    """The source's layers Overtone does not carry, each with the reason."""
    skipped: list[tuple[Layer, str]] = []
    with _mesh_of(obj, evaluated) as mesh:
        for attr in mesh.attributes:
            if _listed_attribute(attr) and not carryable(attr.domain, attr.data_type):
                skipped.append((Layer(attr.name, attr.domain, attr.data_type),
                                not_carried_reason(attr.domain, attr.data_type)))
    return skipped


def list_layers(obj: bpy.types.Object, *, evaluated: bool = False) -> list[Layer]:
    """Every layer a mesh object carries that Overtone can carry, in a stable order.

    Colour attributes (point and corner domain), then generic point attributes
    (FLOAT, FLOAT_VECTOR, INT, BOOLEAN, FLOAT2, QUATERNION, INT8 and integer
    pairs; Blender's own and ``.``-names skipped), then UV maps and other
    corner floats, then face attributes (material index, smooth/flat, face
    sets, any numeric type), then vertex groups.
    """
    found: list[Layer] = []
    with _mesh_of(obj, evaluated) as mesh:
        for attr in mesh.color_attributes:
            if _is_user_layer(attr) and attr.domain in ("POINT", "CORNER"):
                found.append(Layer(attr.name, attr.domain, attr.data_type))
        for domain in ("POINT", "CORNER", "FACE"):
            for attr in mesh.attributes:
                if (_listed_attribute(attr) and attr.domain == domain and attr.data_type in _GENERIC_KIND
                        and carryable(domain, attr.data_type)):
                    found.append(Layer(attr.name, domain, attr.data_type))
        for name in (vg.name for vg in obj.vertex_groups):
            found.append(Layer(name, "POINT", "VERTEX_GROUP"))
    return found


def read_vertex_groups(obj: bpy.types.Object, names: Sequence[str] | None = None, *,
                       evaluated: bool = False) -> dict[str, NDArray[np.float32]]:
    """Vertex-group weights as ``(n,)`` float32 arrays, 0 where unassigned.

    Blender has no bulk getter for weights. The deform layer of a BMesh copy
    is read once and each group picked from it, about twice as fast as walking
    ``mesh.vertices[i].groups`` (docs/measurements.md).
    """
    wanted = [vg.name for vg in obj.vertex_groups] if names is None else list(names)
    for name in wanted:
        if name not in obj.vertex_groups:
            raise ValueError(f"object {obj.name!r} has no vertex group {name!r}")
    weights: dict[str, NDArray[np.float32]] = {}
    with _mesh_of(obj, evaluated) as mesh:
        n = len(mesh.vertices)
        bm = bmesh.new()
        try:
            bm.from_mesh(mesh)
            layer = bm.verts.layers.deform.active
            deform = [vert[layer] for vert in bm.verts] if layer is not None else []
            for name in wanted:
                index = obj.vertex_groups[name].index
                picked = [d.get(index, 0.0) for d in deform] if deform else [0.0] * n
                weights[name] = np.array(picked, dtype=np.float32)
        finally:
            bm.free()  # the deform entries die with it: read above, before this
    return weights


def shape_modifiers(obj: bpy.types.Object) -> list[str]:
    """The viewport modifiers of ``obj`` when, together, they change its shape.

    Returns the names of the modifiers shown in the viewport when the mesh as
    shown differs from the mesh itself (another vertex count, or a vertex
    moved by more than a millionth of the mesh's size); otherwise ``[]``.
    """
    shown = [m.name for m in obj.modifiers if m.show_viewport]
    if not shown:
        return []
    base = read_mesh(obj, local=True)
    evaluated = read_mesh(obj, evaluated=True, local=True)
    if base.vertices.shape != evaluated.vertices.shape:
        return shown
    size = float(np.ptp(base.vertices, axis=0).max()) if len(base.vertices) else 0.0
    moved = float(np.abs(base.vertices - evaluated.vertices).max()) if len(base.vertices) else 0.0
    return shown if moved > 1e-6 * max(size, 1e-12) else []


def layer_names(obj: bpy.types.Object) -> tuple[set[str], set[str]]:
    """The names of ``obj``'s attributes and vertex groups, and of its shape keys."""
    mesh = cast(bpy.types.Mesh, obj.data)
    keys = mesh.shape_keys
    return ({a.name for a in mesh.attributes} | {g.name for g in obj.vertex_groups},
            {k.name for k in keys.key_blocks} if keys else set())


def select_group(obj: bpy.types.Object, name: str) -> int:
    """Select exactly the vertices of ``obj`` with weight in group ``name``; return how many."""
    if obj.mode == 'EDIT':
        raise ValueError(f"object {obj.name!r} is in edit mode; leave it to select a group")
    weights = read_vertex_groups(obj, [name])[name]
    mesh = cast(bpy.types.Mesh, obj.data)
    chosen = weights > 0
    # selection is kept in the boolean attributes .select_vert/_edge/_poly; none means nothing selected
    for layer in (".select_edge", ".select_poly"):
        if layer in mesh.attributes:
            mesh.attributes.remove(mesh.attributes[layer])
    attr = mesh.attributes.get(".select_vert") or mesh.attributes.new(".select_vert", 'BOOLEAN', 'POINT')
    if attr is None:
        raise ValueError(f"object {obj.name!r}: could not select its vertices")
    _elements(attr).foreach_set("value", chosen)
    mesh.update()
    return int(chosen.sum())


def read_signal(obj: bpy.types.Object, signal: Layer, *, evaluated: bool = False) -> Signal:
    """The signal held by one layer from :func:`list_layers`.

    Returns
    -------
    engine.Signal
        Values (m,) or (m, k): float32 (colours: linear RGBA; floats; vectors;
        weights), int32 (labels) or bool (masks); ``m`` vertices or corners
        by domain.
    """
    if signal.data_type == "VERTEX_GROUP":
        return signal.signal(read_vertex_groups(obj, [signal.name], evaluated=evaluated)[signal.name])
    with _mesh_of(obj, evaluated) as mesh:
        attr = mesh.attributes.get(signal.name)
        if attr is None or attr.data_type != signal.data_type or attr.domain != signal.domain:
            raise ValueError(f"object {obj.name!r} has no {signal.domain.lower()} "
                             f"{signal.data_type} attribute {signal.name!r}")
        m = len(_elements(attr))
        width = _CHANNELS[signal.data_type]
        values: NDArray[np.generic] = np.empty(m * max(width, 1), dtype=_READ_DTYPE[signal.data_type])
        _elements(attr).foreach_get(element_property(signal.data_type), values)
    return signal.signal(values.reshape(m, width) if width else values)


# --------------------------------------------------------------------------- outputs


def confidence_output(confidence: NDArray[np.floating[Any]], *,
                      name: str = "overtone_confidence") -> Signal:
    """A point colour showing confidence in [0, 1]: white is sure, red is not.

    Stored linear ``(1, c, c, c)``, so the green, blue and alpha channels hold
    the confidence itself.
    """
    conf = np.asarray(confidence, dtype=np.float64)
    if conf.ndim != 1:
        raise ValueError(f"confidence must be (n,), got shape {conf.shape}")
    if not np.all(np.isfinite(conf)) or conf.size and (conf.min() < 0 or conf.max() > 1):
        raise ValueError("confidence must be finite and within [0, 1]")
    rgba = np.column_stack([np.ones_like(conf), conf, conf, conf]).astype(np.float32)
    return Layer(name, "POINT", "FLOAT_COLOR").signal(rgba)


def shape_key_output(name: str, positions: NDArray[np.floating[Any]]) -> Signal:
    """A shape key from ``(n, 3)`` world-space positions (stored object-local)."""
    return Layer(name, "POINT", "SHAPE_KEY").signal(np.asarray(positions))


def _validated(obj: bpy.types.Object, mesh: bpy.types.Mesh, sig: Signal,
               local: bool = False) -> NDArray[np.generic]:
    where = f"result {sig.name!r} for object {obj.name!r}"
    if sig.data_type not in _CHANNELS:
        raise ValueError(f"{where}: unknown data type {sig.data_type!r}")
    if _KIND_OF_TYPE[sig.data_type] != sig.kind:
        raise ValueError(f"{where}: kind {sig.kind!r} does not match data type {sig.data_type}")
    if not carryable(sig.domain, sig.data_type):
        raise ValueError(f"{where}: domain {sig.domain!r} not supported for {sig.data_type}")
    if not sig.name or (sig.name.startswith(".") and sig.name != _FACE_SETS):
        raise ValueError(f"{where}: names must be non-empty and not start with '.'")
    rows = {"CORNER": len(mesh.loops), "FACE": len(mesh.polygons)}.get(sig.domain, len(mesh.vertices))
    width = _CHANNELS[sig.data_type]
    values: NDArray[Any] = np.asarray(sig.values)
    if sig.data_type in _COLOR_TYPES and values.ndim == 2 and values.shape[1] == 3:
        values = np.column_stack([values, np.ones(len(values), dtype=values.dtype)])
    expected = (rows, width) if width else (rows,)
    if values.shape != expected:
        raise ValueError(f"{where}: expected shape {expected}, got {values.shape}")
    if sig.data_type == "BOOLEAN":
        if values.dtype != np.bool_:
            raise ValueError(f"{where}: a mask needs bool values, got {values.dtype}")
        return values
    if not np.issubdtype(values.dtype, np.number) or np.issubdtype(values.dtype, np.complexfloating):
        raise ValueError(f"{where}: expected real numbers, got {values.dtype}")
    if not np.all(np.isfinite(values)):
        bad = int(np.flatnonzero(~np.isfinite(values.reshape(rows, -1)).all(axis=1))[0])
        raise ValueError(f"{where}: non-finite value at row {bad}")
    if sig.data_type in _INT_RANGE:
        low, high = _INT_RANGE[sig.data_type]
        if values.size and (np.any(values != np.round(values))
                            or values.min() < low or values.max() > high):
            raise ValueError(f"{where}: labels must be whole numbers within [{low}, {high}]")
        return values.astype(np.int32)
    if sig.data_type == "VERTEX_GROUP" and values.size and (values.min() < 0 or values.max() > 1):
        raise ValueError(f"{where}: weights must lie in [0, 1], got "
                         f"[{values.min():g}, {values.max():g}]")
    if sig.data_type == "SHAPE_KEY" and not local:
        matrix = _matrix(obj)
        if abs(np.linalg.det(matrix[:3, :3])) < 1e-12:
            raise ValueError(f"{where}: object matrix is singular, cannot go back to local space")
        inverse = np.linalg.inv(matrix)
        values = values.astype(np.float64) @ inverse[:3, :3].T + inverse[:3, 3]
    return values.astype(np.float32)


def name_limit(data_type: str) -> int:
    """The most bytes Blender keeps in the name of a layer of ``data_type``."""
    return _GROUP_NAME_BYTES if data_type in ("VERTEX_GROUP", "SHAPE_KEY") else _LAYER_NAME_BYTES


def _fit(name: str, tail: str = "", limit: int = _GROUP_NAME_BYTES) -> str:
    """``name`` shortened (on a character boundary) so ``name + tail`` fits in ``limit`` bytes."""
    room = limit - len(tail.encode())
    while len(name.encode()) > room:
        name = name[:-1]
    return name + tail


class _Names:
    """The names in use on the target, and which of them may be replaced."""

    def __init__(self, obj: bpy.types.Object, mesh: bpy.types.Mesh) -> None:
        self.kinds: dict[str, Layer] = {a.name: Layer(a.name, a.domain, a.data_type)
                                        for a in mesh.attributes if a.data_type in _KIND_OF_TYPE}
        self.kinds.update({g.name: Layer(g.name, "POINT", "VERTEX_GROUP") for g in obj.vertex_groups})
        self.layers = {a.name for a in mesh.attributes} | {g.name for g in obj.vertex_groups}
        keys = mesh.shape_keys
        self.shapes = {k.name for k in keys.key_blocks} if keys else set()
        protected = {a.name for a in mesh.attributes if not _is_user_layer(a)}
        self.uv_maps = {uv.name for uv in mesh.uv_layers}
        protected |= self.uv_maps
        self.protected = protected
        if keys:
            self.protected_shapes = {keys.reference_key.name}
        else:
            self.protected_shapes = set()

    def protected_for(self, out: Signal) -> set[str]:
        """The layer names ``out`` may not replace: a UV map may replace a UV map,
        face sets may replace face sets; nothing else replaces Blender's layers."""
        if out.domain == "CORNER" and out.data_type == "FLOAT2":
            return self.protected - self.uv_maps
        if out.name == _FACE_SETS and out.domain == "FACE":
            return self.protected - {_FACE_SETS}
        return self.protected

    def home(self, base: str, protected: set[str], limit: int) -> str:
        """The first ``<base>_ot<k>`` that is not protected: where a result whose own
        name is protected goes, the same name on every run."""
        k = 1
        while _fit(base, f"{SUFFIX}{k}", limit) in protected:
            k += 1
        return _fit(base, f"{SUFFIX}{k}", limit)

    def taken(self, shape: bool) -> set[str]:
        return self.shapes if shape else self.layers

    def fresh(self, base: str, shape: bool, limit: int) -> str:
        """``base``, or ``base_ot<k>`` with the smallest free k; a name over
        ``limit`` bytes is shortened and always gets a suffix, so two long
        names that share their first bytes stay apart."""
        taken = self.taken(shape)
        k = 0 if len(base.encode()) <= limit else 1
        name = _fit(base, f"{SUFFIX}{k}" if k else "", limit)
        while name in taken:
            k += 1
            name = _fit(base, f"{SUFFIX}{k}", limit)
        taken.add(name)
        return name


@dataclass
class _Plan:
    output: Signal
    values: NDArray[np.generic]
    final: str           # the name the result ends with
    write_as: str        # the name it is written under first
    replaces: bool       # an old layer called ``final`` is removed at the end


def _conformed(mesh: bpy.types.Mesh, sig: Signal, values: NDArray[np.generic],
               old: Layer) -> tuple[Signal, NDArray[np.generic]] | None:
    """The result shaped as the layer it replaces (that layer's domain and type),
    or None when it cannot be (another kind, or a domain that cannot hold it)."""
    if old.data_type == sig.data_type and old.domain == sig.domain:
        return sig, values
    if old.kind != sig.kind or sig.kind != "color" or old.domain not in ("POINT", "CORNER"):
        return None
    if old.domain != sig.domain:
        corner_verts = np.empty(len(mesh.loops), dtype=np.int32)
        _elements(mesh.attributes[".corner_vert"]).foreach_get("value", corner_verts)
        if old.domain == "CORNER":
            values = values[corner_verts]
        else:
            sums = np.zeros((len(mesh.vertices), values.shape[1]))
            np.add.at(sums, corner_verts, values)
            counts = np.bincount(corner_verts, minlength=len(mesh.vertices))
            values = (sums / np.maximum(counts, 1)[:, None]).astype(np.float32)
    return old.signal(values), values


def _plan(obj: bpy.types.Object, mesh: bpy.types.Mesh, outputs: Sequence[Signal],
          may_replace: Callable[[str], bool], local: bool) -> list[_Plan]:
    """Check every result and choose its name (nothing is written here)."""
    names = _Names(obj, mesh)
    seen: set[tuple[bool, str]] = set()
    plans: list[_Plan] = []
    for out in outputs:
        values = _validated(obj, mesh, out, local)
        shape = out.data_type == "SHAPE_KEY"
        wanted = out.name
        if (shape, wanted) in seen:
            raise ValueError(f"two results are called {wanted!r}")
        seen.add((shape, wanted))
        protected = names.protected_shapes if shape else names.protected_for(out)
        limit = name_limit(out.data_type)
        if not shape and wanted in protected and may_replace(names.home(wanted, protected, limit)):
            wanted = names.home(wanted, protected, limit)  # one name on every run, never Blender's layer
        fitted = None
        if wanted in names.taken(shape) and may_replace(wanted) and wanted not in protected:
            old = names.kinds.get(wanted)  # None: a layer type Overtone does not write, kept
            fitted = (out, values) if shape else None if old is None else _conformed(mesh, out, values, old)
        if fitted is not None:
            plans.append(_Plan(fitted[0], fitted[1], wanted, names.fresh(wanted, shape, limit), True))
        else:
            final = names.fresh(wanted, shape, limit)
            plans.append(_Plan(out, values, final, final, False))
    return plans


def _snapshot(obj: bpy.types.Object, mesh: bpy.types.Mesh) -> dict[str, object]:
    colors = mesh.color_attributes
    uvs = mesh.uv_layers
    render_uv = next((uv.name for uv in uvs if uv.active_render), None)
    render = colors.render_color_index
    return {"active_uv": uvs.active.name if uvs.active else None, "render_uv": render_uv,
            "active_color": colors.active_color_name,
            "render_color": colors[render].name if 0 <= render < len(colors) else None,
            "active_attr": mesh.attributes.active.name if mesh.attributes.active else None,
            "active_group": obj.vertex_groups.active.name if obj.vertex_groups.active else None,
            "active_shape": obj.active_shape_key_index}


def _restore(obj: bpy.types.Object, mesh: bpy.types.Mesh, state: dict[str, object]) -> None:
    """Put back the active and render colour, active attribute and group, by name."""
    colors = mesh.color_attributes
    names = [c.name for c in colors]
    active_color, render_color = state["active_color"], state["render_color"]
    if isinstance(active_color, str) and active_color in names:
        colors.active_color_name = active_color
    if isinstance(render_color, str) and render_color in names:
        colors.render_color_index = names.index(render_color)
    active = state["active_attr"]
    if isinstance(active, str) and active in mesh.attributes:
        mesh.attributes.active = mesh.attributes[active]
    group = state["active_group"]
    if isinstance(group, str) and group in obj.vertex_groups:
        obj.vertex_groups.active_index = obj.vertex_groups[group].index
    keys = mesh.shape_keys
    if keys is not None and cast(int, state["active_shape"]) < len(keys.key_blocks):
        obj.active_shape_key_index = cast(int, state["active_shape"])
    _restore_uv_maps(mesh, state)


def _restore_uv_maps(mesh: bpy.types.Mesh, state: dict[str, object]) -> None:
    """The active and render UV maps back by name (a replaced map keeps its role)."""
    uvs = mesh.uv_layers
    active, render = state.get("active_uv"), state.get("render_uv")
    if isinstance(active, str) and active in uvs:
        uvs.active = uvs[active]
    if isinstance(render, str) and render in uvs:
        uvs[render].active_render = True


def _write_vertex_group(obj: bpy.types.Object, mesh: bpy.types.Mesh, name: str,
                        weights: NDArray[np.float32]) -> None:
    # Fastest exact route (against vg.add per vertex or per distinct weight, see
    # docs/measurements.md): write a FLOAT point attribute and let Blender convert
    # it. Vertices of weight 0 stay unassigned, which Blender and
    # read_vertex_groups both read as 0.
    attr = mesh.attributes.new(name, 'FLOAT', 'POINT')
    if attr is None:
        raise ValueError(f"object {obj.name!r}: could not create vertex group {name!r}")
    _elements(attr).foreach_set("value", weights)
    mesh.attributes.active = attr
    try:
        with bpy.context.temp_override(object=obj, active_object=obj):
            bpy.ops.geometry.attribute_convert(mode='VERTEX_GROUP')
    except RuntimeError:
        pass  # operator unavailable here (e.g. no object context): fall back below
    if name in obj.vertex_groups:
        return
    if name in mesh.attributes:
        mesh.attributes.remove(mesh.attributes[name])
    group = obj.vertex_groups.new(name=name)
    add = group.add
    for index, weight in enumerate(weights.tolist()):
        if weight:
            add((index,), weight, 'REPLACE')


def _write_shape_key(obj: bpy.types.Object, mesh: bpy.types.Mesh, name: str,
                     local: NDArray[np.float32], value: float) -> None:
    if mesh.shape_keys is None:
        obj.shape_key_add(name="Basis", from_mix=False)
    key = obj.shape_key_add(name=name, from_mix=False)
    key.data.foreach_set("co", local.ravel())
    key.value = value
    mesh.update()


def _write_layer(obj: bpy.types.Object, mesh: bpy.types.Mesh, sig: Signal, name: str,
                 values: NDArray[np.generic], key_value: float = 1.0) -> None:
    if sig.data_type == "VERTEX_GROUP":
        _write_vertex_group(obj, mesh, name, cast("NDArray[np.float32]", values))
        return
    if sig.data_type == "SHAPE_KEY":
        _write_shape_key(obj, mesh, name, cast("NDArray[np.float32]", values), key_value)
        return
    if sig.data_type in _COLOR_TYPES and sig.domain in ("POINT", "CORNER"):
        color = mesh.color_attributes.new(name, sig.data_type, sig.domain)
        if color is None:
            raise ValueError(f"object {obj.name!r}: could not create colour attribute {name!r}")
        _elements(color).foreach_set("color", values.ravel())
        return
    attr = mesh.attributes.new(name, sig.data_type, sig.domain)
    if attr is None:
        raise ValueError(f"object {obj.name!r}: could not create attribute {name!r}")
    _elements(attr).foreach_set(element_property(sig.data_type), values.ravel())


def _remove(obj: bpy.types.Object, mesh: bpy.types.Mesh, name: str, shape: bool) -> None:
    if shape:
        keys = mesh.shape_keys
        if keys is not None and name in keys.key_blocks:
            obj.shape_key_remove(keys.key_blocks[name])
        return
    if name in obj.vertex_groups:
        obj.vertex_groups.remove(obj.vertex_groups[name])
    if name in mesh.attributes:
        mesh.attributes.remove(mesh.attributes[name])


def _rename(obj: bpy.types.Object, mesh: bpy.types.Mesh, old: str, new: str, shape: bool) -> None:
    if shape:
        assert mesh.shape_keys is not None
        mesh.shape_keys.key_blocks[old].name = new
    elif old in obj.vertex_groups:
        obj.vertex_groups[old].name = new
    else:
        mesh.attributes[old].name = new


def _key_value(mesh: bpy.types.Mesh, name: str, default: float) -> float:
    """The value of shape key ``name`` (the artist's choice to keep on a refresh), else ``default``."""
    keys = mesh.shape_keys
    if keys is not None and name in keys.key_blocks:
        return float(keys.key_blocks[name].value)
    return default


def write_outputs(obj: bpy.types.Object, outputs: Sequence[Signal], *, replace: bool = False,
                  refresh: Collection[str] = (), local: bool = False,
                  key_value: float = 1.0) -> dict[str, str]:
    """Write results onto a mesh object, all or nothing.

    Parameters
    ----------
    obj : bpy.types.Object
        The target mesh object (object mode).
    outputs : sequence of engine.Signal
        The results, each with its domain and Blender data type: values
        ``(m,)`` for FLOAT, INT, BOOLEAN and VERTEX_GROUP, ``(m, 3)`` for
        FLOAT_VECTOR and SHAPE_KEY (positions), ``(m, 4)`` or ``(m, 3)``
        linear RGB(A) for colours. Names must be distinct within a kind
        (layers / shape keys).
    replace : bool
        Replace a target layer that already has a result's name; otherwise the
        result gets the next free ``<name>_ot<k>``.
    refresh : collection of str
        Names that are replaced even without ``replace`` (what Overtone wrote
        there before).
    local : bool
        Shape-key positions are in the object's own space (default: world).
    key_value : float
        Value of a new shape key; a replaced key keeps the value it had.

    A replaced layer keeps its domain and type (a colour changes domain by
    taking each vertex's value to its corners, or the mean of its corners);
    one of another kind is kept and the result takes a fresh name. The active
    and render colour, active attribute and active group stay as they were.

    Returns
    -------
    dict
        Result name -> the name it was written under.

    Raises
    ------
    ValueError
        On any bad array or name, before anything is written; on a failure
        while writing, after removing what this call added.
    """
    if obj.type != 'MESH':
        raise ValueError(f"object {obj.name!r} is not a mesh (type {obj.type})")
    if obj.mode == 'EDIT':
        raise ValueError(f"object {obj.name!r} is in edit mode; leave it to write results")
    mesh = cast(bpy.types.Mesh, obj.data)
    plans = _plan(obj, mesh, outputs, lambda name: replace or name in refresh, local)
    state = _snapshot(obj, mesh)
    had_keys = mesh.shape_keys is not None
    written: list[_Plan] = []
    try:
        for plan in plans:
            written.append(plan)
            value = _key_value(mesh, plan.final, key_value) if plan.replaces else key_value
            _write_layer(obj, mesh, plan.output, plan.write_as, plan.values, value)
    except BaseException:
        for plan in reversed(written):
            _remove(obj, mesh, plan.write_as, plan.output.data_type == "SHAPE_KEY")
        if not had_keys and mesh.shape_keys is not None:
            obj.shape_key_clear()
        _restore(obj, mesh, state)
        mesh.update()
        raise
    for plan in plans:
        if plan.replaces:
            shape = plan.output.data_type == "SHAPE_KEY"
            _remove(obj, mesh, plan.final, shape)
            _rename(obj, mesh, plan.write_as, plan.final, shape)
    _restore(obj, mesh, state)
    mesh.update()
    return {plan.output.name: plan.final for plan in plans}
