"""Build step: compile the JSON Schemas into Python validators (fastjsonschema) inside the wheel.

Compiling a schema at run time costs a command about a tenth of a second, mostly Python compiling the generated
source; shipped as modules, the validators load from their cached bytecode. Each module records the SHA-256 of the
schema it was made from, and `stagewatch.resources.compiled` uses it only while that still matches.
"""

from __future__ import annotations

import hashlib
import json
import re
import tempfile
from pathlib import Path
from typing import Any

from hatchling.builders.hooks.plugin.interface import BuildHookInterface

SCHEMAS = Path(__file__).resolve().parent / "src" / "stagewatch" / "schemas"
PACKAGE = "stagewatch/compiled_schemas"


def _never(value: object) -> bool:  # a stand-in: the real format checks are passed in at run time
    return True


class CompiledSchemas(BuildHookInterface):
    PLUGIN_NAME = "custom"

    def initialize(self, version: str, build_data: dict[str, Any]) -> None:
        if self.target_name != "wheel":
            return
        import fastjsonschema

        self._out = tempfile.TemporaryDirectory()
        out = Path(self._out.name)
        (out / "__init__.py").write_text('"""JSON Schemas compiled at build time (see hatch_build.py)."""\n')
        build_data["force_include"][str(out / "__init__.py")] = f"{PACKAGE}/__init__.py"
        for path in sorted(SCHEMAS.glob("*.schema.json")):
            raw = path.read_bytes()
            code = fastjsonschema.compile_to_code(json.loads(raw), formats={"bounded-duration": _never},
                                                  use_default=False)
            entry = re.search(r"^def (\w+)\(data", code, re.MULTILINE)
            assert entry, f"no entry function in the code compiled from {path.name}"
            name = path.name.removesuffix(".schema.json").replace("-", "_") + ".py"
            (out / name).write_text(f"# Compiled from {path.name} by hatch_build.py; do not edit.\n{code}\n"
                                    f"validate = {entry.group(1)}\n"
                                    f"SCHEMA_SHA256 = {hashlib.sha256(raw).hexdigest()!r}\n")
            build_data["force_include"][str(out / name)] = f"{PACKAGE}/{name}"

    def finalize(self, version: str, build_data: dict[str, Any], artifact_path: str) -> None:
        if getattr(self, "_out", None) is not None:
            self._out.cleanup()
