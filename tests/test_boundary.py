"""The engine never learns that Blender exists (DEVELOPERS.md, the boundary rule)."""

import re
from pathlib import Path

ENGINE = Path(__file__).resolve().parents[1] / "engine"
FORBIDDEN = re.compile(r"\b(bpy|bmesh|mathutils)\b")


def test_engine_never_mentions_blender_modules():
    files = sorted(ENGINE.rglob("*.py"))
    assert files, "engine/ has no Python files"
    offenders = [f"{p.relative_to(ENGINE.parent)}:{i}" for p in files
                 for i, line in enumerate(p.read_text().splitlines(), 1) if FORBIDDEN.search(line)]
    assert offenders == []


def test_engine_imports_only_stdlib_numpy_scipy_earcut():
    import sys
    # mapbox_earcut: ear cutting for polygons in files, optional (engine/intake/triangulation.py
    # falls back to its own ear clipping without it); fast_simplification: the quadric simplifier
    # of the stand-ins (engine/matching/standin.py), imported only where a huge mesh is simplified,
    # with a clear reason when missing. Both are bundled with the extension as wheels.
    allowed_third_party = {"numpy", "scipy", "mapbox_earcut", "fast_simplification"}
    stdlib = set(sys.stdlib_module_names)
    pattern = re.compile(r"^\s*(?:import|from)\s+([A-Za-z_][\w]*)", re.M)
    bad = []
    for p in ENGINE.rglob("*.py"):
        for name in pattern.findall(p.read_text()):
            if name not in stdlib and name not in allowed_third_party and name != "__future__":
                bad.append((p.name, name))
    assert bad == []
