"""Run an Overtone batch job from a Blender command line.

    blender -b scene.blend -P scripts/overtone_batch.py -- JOB.json [--report R] [--save | --save-as P]

Calls the same handler as ``blender -b scene.blend -c overtone_batch ...``, from
the installed and enabled Overtone extension.
"""

import importlib
import sys

import bpy


def _extension_module() -> str | None:
    prefs = bpy.context.preferences
    for addon in (prefs.addons if prefs is not None else ()):
        if addon.module == "overtone" or addon.module.endswith(".overtone"):
            return addon.module
    return None


def run(argv: list[str]) -> int:
    module = _extension_module()
    if module is None:
        print("overtone_batch: error: the Overtone extension is not installed and enabled",
              file=sys.stderr)
        return 2
    batch = importlib.import_module(module + ".batch")
    return int(batch.main(argv))


if __name__ == "__main__":
    args = sys.argv[sys.argv.index("--") + 1:] if "--" in sys.argv else []
    sys.exit(run(args))
