"""The documentation a reader is pointed to exists: every ``docs/FILE.md §N`` named in code, tests and guides."""

from __future__ import annotations

import re
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
SCANNED = ("agent", "collector", "listenpost", "tests", "bench", "systemd", "replay_logs")
POINTER = re.compile(r"docs/([a-z0-9-]+\.md)((?:,? (?:§|and §)\d+(?:\.\d+)?)*)")


def pointers() -> list[tuple[Path, str, list[str]]]:
    files = [
        p for d in SCANNED for p in (ROOT / d).rglob("*") if p.suffix in (".py", ".md", ".yaml", ".service")
    ]
    files += [ROOT / "README.md", ROOT / "DEVELOPERS.md"]
    out = []
    for f in files:
        for m in POINTER.finditer(f.read_text(encoding="utf-8")):
            out.append((f, m.group(1), re.findall(r"§(\d+(?:\.\d+)?)", m.group(2))))
    return out


def headings(doc: Path) -> set[str]:
    """Section numbers of ``## 3. Time`` and ``### 2.1 On the board`` style headings."""
    return set(re.findall(r"^#{2,3} (\d+(?:\.\d+)?)\.? ", doc.read_text(encoding="utf-8"), re.M))


def test_every_docs_pointer_names_a_file_and_section_that_exist():
    found = pointers()
    assert len(found) > 50  # the scan really reads the tree
    missing = []
    for f, name, sections in found:
        doc = ROOT / "docs" / name
        if not doc.exists():
            missing.append(f"{f.relative_to(ROOT)}: docs/{name} does not exist")
            continue
        have = headings(doc)
        missing += [f"{f.relative_to(ROOT)}: docs/{name} has no §{s}" for s in sections if s not in have]
    assert not missing, "\n".join(missing)


def test_no_pointer_leaves_the_repository():
    # Upper-case note names (built here so this file does not match itself) belong to no reader.
    names = ("design", "references", "style", "scenario", "ble-notes", "reliability-notes")
    planning = re.compile("(" + "|".join(n.upper() for n in names) + r")(\.md)?")
    hits = []
    for d in SCANNED:
        for f in (ROOT / d).rglob("*"):
            if f.is_file() and f.suffix in (".py", ".md", ".yaml", ".service", ".html", ".js", ".css"):
                for n, line in enumerate(f.read_text(encoding="utf-8").splitlines(), 1):
                    if planning.search(line):
                        hits.append(f"{f.relative_to(ROOT)}:{n}: {line.strip()}")
    assert not hits, "\n".join(hits)
