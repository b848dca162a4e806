"""Write docs/fhir/codesystems.json: the project CodeSystems for the shipped default rulebook.

    .venv/bin/python tools/make_codesystems.py [--base URL] [--out FILE]

Run it after a change to the default rulebook's disorders, findings, qualifiers or reported
values; tests/test_codes.py checks the shipped file is current.
"""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT / "engine"))


def main(argv: list[str] | None = None) -> int:
    import gasrules
    from gasrules.integration.terminology import DEFAULT_BASE, codesystem_bundle

    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--base", default=DEFAULT_BASE, help="canonical base URL")
    ap.add_argument("--out", type=Path, default=ROOT / "docs" / "fhir" / "codesystems.json")
    args = ap.parse_args(argv)
    bundle = codesystem_bundle(gasrules.load_rulebook(), args.base)
    args.out.write_text(json.dumps(bundle, indent=1, ensure_ascii=False) + "\n", encoding="utf-8")
    print(
        f"wrote {args.out}: "
        + ", ".join(f"{e['resource']['id']} ({e['resource']['count']})" for e in bundle["entry"])
    )
    return 0


if __name__ == "__main__":
    sys.exit(main())
