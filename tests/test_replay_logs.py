"""The demo logs in replay_logs/ are what their README says: remade, they match byte for byte."""

from __future__ import annotations

import re
import shlex
from pathlib import Path

import pytest

from monitor.cli import main
from monitor.records.interchange import read_csv

ROOT = Path(__file__).resolve().parent.parent
LOGS = ROOT / "replay_logs"


def _commands() -> list[tuple[str, list[str]]]:
    text = (LOGS / "README.md").read_text(encoding="utf-8")
    found = []
    for command in re.findall(r"`ebullio (simulate [^`]+)`", text):
        argv = shlex.split(command)
        out = argv[argv.index("--out") + 1]
        found.append((Path(out).name, argv))
    return found


def test_readme_covers_every_log():
    assert sorted(name for name, _ in _commands()) == sorted(p.name for p in LOGS.glob("*.csv"))


@pytest.mark.parametrize(
    ("name", "argv"), _commands(), ids=lambda v: v if isinstance(v, str) else ""
)
def test_log_is_remade_byte_for_byte(name, argv, tmp_path):
    out = tmp_path / name
    argv = [*argv]
    argv[argv.index("--out") + 1] = str(out)
    assert main(argv) == 0

    def body(path: Path) -> list[str]:
        # the version line changes with every release; everything else must not
        lines = path.read_text(encoding="utf-8").splitlines()
        return [line for line in lines if not line.startswith("# ebullio_version:")]

    assert body(out) == body(LOGS / name)
    log = read_csv(LOGS / name)
    assert log.rejected == []
    assert len(log.rows) > 800
