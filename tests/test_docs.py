"""The documentation runs as written: every example of README.md and docs/*.md.

Console blocks are run command by command in a fresh folder per page (exit code 0
expected); python blocks are executed; blocks marked ``<!-- skip: REASON -->`` are
reported as skipped with that reason.  See tests/doc_examples.py for the conventions
and for regenerating the pasted output.  The published values the examples quote are
asserted in the examples themselves (docs/api.md) or by the kernel tests.
"""

from __future__ import annotations

import re
from pathlib import Path

import pytest

from . import doc_examples as D

PAGES = D.page_paths()
#: pages other branches add (linked from the README before they land)
PENDING_PAGES = {"docs/bath.md"}


def _skipped_blocks():
    for page in PAGES:
        for block in D.parse_blocks(page):
            if block.skip is not None:
                yield pytest.param(block, id=block.name)


@pytest.mark.slow
@pytest.mark.parametrize("page", PAGES, ids=[str(p.relative_to(D.ROOT)) for p in PAGES])
def test_examples_of_the_page_run(page: Path, tmp_path: Path):
    failures = D.run_page(page, tmp_path)
    assert not failures, "\n".join(failures)


@pytest.mark.parametrize("block", list(_skipped_blocks()))
def test_long_examples_are_marked_with_a_reason(block):
    assert block.skip.strip(), f"{block.name}: a skip mark needs a reason"
    pytest.skip(f"{block.name} not run: {block.skip}")


def test_every_command_example_is_in_a_console_block():
    """A command in an indented or untagged code block would escape the test.

    Synopses with placeholders go in ``text`` blocks; examples in ``console`` blocks.
    """
    offenders = []
    for page in PAGES:
        inside, lang = False, ""
        for n, line in enumerate(page.read_text().splitlines(), 1):
            fence = D._FENCE.match(line)
            if line.startswith("```"):
                inside, lang = (not inside), (fence.group(1) if fence and not inside else "")
                continue
            text = line.strip()
            in_code = (inside and lang in ("", "sh", "bash", "shell")) or (not inside and line.startswith("    "))
            if re.match(r"^(\$ )?(\.venv/bin/)?leadline [a-z]", text) and in_code:
                offenders.append(f"{page.relative_to(D.ROOT)}:{n}: {text[:80]}")
    assert not offenders, "command examples outside console blocks:\n" + "\n".join(offenders)


def test_spec_files_in_the_docs_are_valid(tmp_path):
    """Every study spec shown as a file is accepted by the spec checker."""
    from leadline.jobs.spec import load_spec

    checked = 0
    for page in PAGES:
        for block in D.parse_blocks(page):
            if block.file and block.lang == "toml" and "[study]" in block.text:
                path = tmp_path / page.stem / block.file
                path.parent.mkdir(parents=True, exist_ok=True)
                path.write_text(block.text)
                load_spec(path)
                checked += 1
    assert checked >= 3


def test_batch_files_in_the_docs_are_valid(tmp_path):
    from leadline.cluster.batch import load_batch_config

    checked = 0
    for page in PAGES:
        for block in D.parse_blocks(page):
            if block.file and block.lang == "toml" and "system =" in block.text:
                path = tmp_path / block.file
                path.write_text(block.text)
                load_batch_config(path)
                checked += 1
    assert checked >= 2


def test_readme_is_a_front_door():
    text = (D.ROOT / "README.md").read_text()
    assert len(text.splitlines()) <= 250
    for target in re.findall(r"\]\((docs/[^)#]+)", text):
        if target not in PENDING_PAGES:
            assert (D.ROOT / target).is_file(), f"README links to missing {target}"
    linked = set(re.findall(r"\]\((docs/[^)#]+\.md)", text))
    for page in (D.ROOT / "docs").glob("*.md"):
        assert f"docs/{page.name}" in linked, f"docs/{page.name} is not linked from the README"


def test_links_between_pages_resolve():
    for page in PAGES:
        for target in re.findall(r"\]\(([^)#:]+\.md)", page.read_text()):
            resolved = (page.parent / target).resolve()
            rel = str(resolved.relative_to(D.ROOT)) if resolved.is_relative_to(D.ROOT) else target
            if rel in PENDING_PAGES:
                continue
            assert resolved.is_file(), f"{page.name} links to missing {target}"


def test_no_pointer_outside_the_repository():
    """Docs and code say what they mean instead of pointing at notes a reader cannot open."""
    # notes kept outside the repository, spelled in pieces so this guard does not match itself
    outside = ["/work/" + "notes", "/work/" + "shared", r"\.\./" + "shared", "formula" + r"\.md", "design " + "note"]
    patterns = re.compile("|".join(outside), re.I)
    offenders = []
    for path in D.ROOT.rglob("*"):
        rel_parts = path.relative_to(D.ROOT).parts
        if path.suffix not in {".py", ".md", ".toml"} or any(part.startswith(".") for part in rel_parts) \
                or "demo-output" in rel_parts or not path.is_file():
            continue
        if path.resolve() == Path(__file__).resolve():
            continue
        for n, line in enumerate(path.read_text(errors="replace").splitlines(), 1):
            if patterns.search(line):
                offenders.append(f"{path.relative_to(D.ROOT)}:{n}: {line.strip()[:80]}")
    assert not offenders, "\n".join(offenders)
