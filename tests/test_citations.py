"""Citations name the published source, never the project's private notes.

The notes the check values were gathered in live outside the repository, where no
user or reader of the code can open them, so a comment, docstring or message that
points there cites nothing. The source beside a value must be the standard, table,
paper, book or library it came from (issue 15).
"""

from __future__ import annotations

from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
#: Where code, tests and documentation live.
SCANNED = ("monitor", "drivers", "dashboard", "tests", "benchmarks", "docs", "README.md",
           "DEVELOPERS.md")  # fmt: skip
#: Spelled in two halves so that this file does not hold them whole either.
FORBIDDEN = ("shared/" + "reference", "REFERENCE" + ".md", "REFERENCE" + " §")
SKIPPED_DIRS = {"__pycache__", ".pytest_cache", ".hypothesis"}


def _files(root: Path) -> list[Path]:
    found: list[Path] = []
    for name in SCANNED:
        top = root / name
        if top.is_file():
            found.append(top)
        elif top.is_dir():
            found += [
                p
                for p in top.rglob("*")
                if p.is_file() and not SKIPPED_DIRS.intersection(p.relative_to(root).parts)
            ]
    return sorted(found)


def _mentions(root: Path, skip: Path | None = None) -> list[str]:
    """Return "path:line: text" for each line under ``root`` that names the notes."""
    hits: list[str] = []
    for path in _files(root):
        if skip is not None and path.resolve() == skip.resolve():
            continue
        text = path.read_text(encoding="utf-8", errors="replace")
        for number, line in enumerate(text.splitlines(), start=1):
            if any(word in line for word in FORBIDDEN):
                hits.append(f"{path.relative_to(root)}:{number}: {line.strip()}")
    return hits


def test_no_file_cites_the_private_reference_notes() -> None:
    files = _files(ROOT)
    assert any(p.suffix == ".py" for p in files), "the scan found no sources"
    assert any(p.suffix == ".md" for p in files), "the scan found no documents"
    hits = _mentions(ROOT, skip=Path(__file__))
    assert not hits, "cite the published source instead:\n" + "\n".join(hits)


def test_the_scan_finds_a_planted_mention(tmp_path: Path) -> None:
    (tmp_path / "tests").mkdir()
    (tmp_path / "tests" / "test_x.py").write_text("# value, see " + FORBIDDEN[1] + " §3\n")
    (tmp_path / "docs").mkdir()
    (tmp_path / "docs" / "a.md").write_text("clean line\nfrom " + FORBIDDEN[0] + "/notes\n")
    (tmp_path / "README.md").write_text("nothing here\n")
    cache = tmp_path / "monitor" / "__pycache__"
    cache.mkdir(parents=True)
    (cache / "x.txt").write_text(FORBIDDEN[1])  # a cache is not a source
    assert _mentions(tmp_path) == [
        f"docs/a.md:2: from {FORBIDDEN[0]}/notes",
        f"tests/test_x.py:1: # value, see {FORBIDDEN[1]} §3",
    ]
