"""Regenerate ``clients/typescript/sluice.d.ts`` from the app's OpenAPI document.

    make types          # = python clients/typescript/generate.py

The document comes from ``app.main.create_app`` with the built-in demo config and no
environment overrides (the document does not depend on the sources); the types are written
by ``openapi-typescript`` (npm, installed in tests/js by ``make node``) with:

* ``--default-non-nullable false``: a field with a default (``limit``, ``empty_bins``) stays
  optional in a request, as the API accepts it;
* ``--root-types --root-types-no-schema-prefix``: every schema is also exported by its own
  name (``ChartRequest``, ``Channel``, ...) next to ``paths`` / ``components``;
* ``--alphabetize``: a stable order, so a diff shows real changes only.

``tests/test_typescript.py`` regenerates from the live app's ``/openapi.json`` and fails
when the committed file is not current.
"""

from __future__ import annotations

import json
import subprocess
import sys
import tempfile
from pathlib import Path

HERE = Path(__file__).resolve().parent
REPO = HERE.parents[1]
OUT = HERE / "sluice.d.ts"
TOOL = REPO / "tests" / "js" / "node_modules" / ".bin" / "openapi-typescript"
FLAGS = ["--default-non-nullable", "false", "--root-types", "--root-types-no-schema-prefix",
         "--alphabetize"]


def build_app():
    """The app the document is taken from: the built-in demo config, no SLUICE_* overrides."""
    from app.main import create_app
    from app.settings import load_settings

    return create_app(load_settings(None, environ={}))


def openapi_document() -> dict:
    return build_app().openapi()


def typescript(doc: dict) -> str:
    """The ``openapi-typescript`` output for ``doc``."""
    if not TOOL.exists():
        raise SystemExit(f"{TOOL} is missing: run `make node` (npm ci in tests/js)")
    with tempfile.TemporaryDirectory() as tmp:
        src, dst = Path(tmp) / "openapi.json", Path(tmp) / "sluice.d.ts"
        src.write_text(json.dumps(doc, indent=1, sort_keys=True), encoding="utf-8")
        subprocess.run([str(TOOL), str(src), "-o", str(dst), *FLAGS], check=True,
                       capture_output=True, timeout=120)
        return dst.read_text(encoding="utf-8")


def main() -> int:
    sys.path.insert(0, str(REPO))
    OUT.write_text(typescript(openapi_document()), encoding="utf-8")
    print(f"wrote {OUT.relative_to(REPO)}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
