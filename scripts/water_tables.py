"""Write monitor/physics/water_tables.json: the water property tables built afresh from
IAPWS-IF97 (the iapws library). Run it after changing how the tables are built:

    .venv/bin/python scripts/water_tables.py

tests/monitor/test_water.py fails while the shipped file and a fresh build differ.
"""

from __future__ import annotations

import json
import sys
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from monitor.physics import water


def main() -> int:
    text = json.dumps(water.tables_document(), indent=1) + "\n"
    water.TABLES_PATH.write_text(text, encoding="utf-8")
    print(f"wrote {water.TABLES_PATH} ({len(text)} bytes)")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
