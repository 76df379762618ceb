"""The docs name only code that exists: every `envelope.x.y` in docs/, README and DEVELOPERS resolves."""

import importlib
import re
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
PAGES = sorted((ROOT / "docs").glob("*.md")) + [ROOT / "README.md", ROOT / "DEVELOPERS.md"]


def resolves(ref: str) -> bool:
    """Import the longest module prefix of ``ref``, then follow the rest as attributes."""
    parts = ref.split(".")
    for i in range(len(parts), 0, -1):
        try:
            obj = importlib.import_module(".".join(parts[:i]))
        except ImportError:
            continue
        for name in parts[i:]:
            if not hasattr(obj, name):
                return False
            obj = getattr(obj, name)
        return True
    return False


@pytest.mark.parametrize("page", PAGES, ids=lambda p: p.name)
def test_every_code_reference_resolves(page):
    # Common practice, no source: a renamed module or function must not leave the docs pointing at nothing
    refs = set(re.findall(r"`(envelope(?:\.[A-Za-z_][A-Za-z0-9_]*)+)", page.read_text(encoding="utf-8")))
    missing = sorted(r for r in refs if not resolves(r))
    assert not missing, f"{page.name} names code that does not exist: {', '.join(missing)}"
