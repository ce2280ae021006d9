"""Every relative link in the Markdown docs points at a file that exists (docs live beside the
code they describe, so a move must carry its links along)."""

from __future__ import annotations

import re

from tests.paths import ROOT

_LINK = re.compile(r"\]\(([^)\s]+)\)")


def test_relative_links_resolve() -> None:
    pages = [p for p in ROOT.rglob("*.md") if not {".venv", ".git", "node_modules"} & set(p.parts)
             and ".pytest_cache" not in p.parts]
    assert len(pages) >= 8
    broken = []
    for page in pages:
        for target in _LINK.findall(page.read_text(encoding="utf-8")):
            if re.match(r"^[a-z]+:|^#", target):
                continue
            path = (page.parent / target.partition("#")[0]).resolve()
            if not path.exists():
                broken.append(f"{page.relative_to(ROOT)} -> {target}")
    assert not broken, "\n".join(broken)


def test_the_readme_states_the_english_only_scope_with_files_that_exist() -> None:
    readme = (ROOT / "README.md").read_text(encoding="utf-8")
    section = readme[readme.index("### English only"):]
    section = section[:section.index("\n## ")]
    for word in ("CMUdict", "number", "safety_words", "prompts", "common", "another language"):
        assert word in section, word
    paths = re.findall(r"`((?:stages|scripts)/[^`]+)`", section)
    assert len(paths) >= 5
    missing = [path for path in paths if not (ROOT / path).exists()]
    assert not missing, missing
