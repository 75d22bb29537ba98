"""Run the examples of README.md and docs/*.md as written, and regenerate their output.

Conventions of the Markdown pages (kept deliberately small):

* a fenced block tagged ``console`` holds commands, each on a line starting
  with ``$ `` (a trailing backslash continues it), followed by the output the
  command printed in a real run (stdout and stderr, as a terminal shows them);
  the commands of one block run in one shell (variables carry over); each must
  exit 0, except one whose shown output starts with ``leadline: error:``, which
  must exit 2;
* a fenced block tagged ``python`` is run with ``exec`` (one namespace per page);
* a ``<!-- file: NAME -->`` comment right before a fenced block writes the
  block's text to NAME in the page's working folder (specs, batch files);
* a ``<!-- skip: REASON -->`` comment right before a block means the block is
  not run by the tests (REASON says why, and where it is run instead);
* ``<!-- output: none -->`` before a console block: its output is never pasted;
  otherwise a command with lines under it (``...`` as a placeholder) gets its
  real output pasted there when the page is regenerated.

Blocks of one page run in order, in one temporary folder, so a later block can
use what an earlier one wrote.  The folder holds a link ``tests`` to the
repository's tests/ (data files) and an empty ``docs/``, so snippets written to
run from the repository root run unchanged without touching the repository.

Regenerate the pasted output of a page from a real run of the current code::

    .venv/bin/python -m leadline.tests.doc_examples docs/cli.md [README.md ...]

(the output under each command is replaced by what it prints now; nothing else
changes).
"""

from __future__ import annotations

import os
import re
import subprocess
import sys
from dataclasses import dataclass, field
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent

_FENCE = re.compile(r"^```(\w*)\s*$")
_MARK = re.compile(r"^<!--\s*(skip|file|output):\s*(.*?)\s*-->\s*$")


@dataclass
class Block:
    page: str
    line: int  # 1-based line of the opening fence
    lang: str
    text: str
    skip: str | None = None
    file: str | None = None
    output: str | None = None
    start: int = 0  # index of the first content line
    end: int = 0  # index of the closing fence

    @property
    def name(self) -> str:
        return f"{self.page}:{self.line}"


@dataclass
class Command:
    command: str
    raw: list[str] = field(default_factory=list)  # the lines as written on the page
    output: list[str] = field(default_factory=list)


def page_paths() -> list[Path]:
    """README.md and every docs/*.md page."""
    return [ROOT / "README.md"] + sorted((ROOT / "docs").glob("*.md"))


def parse_blocks(path: Path) -> list[Block]:
    lines = path.read_text().splitlines()
    blocks: list[Block] = []
    i = 0
    marks: dict[str, str] = {}
    while i < len(lines):
        m = _MARK.match(lines[i])
        if m:
            marks[m.group(1)] = m.group(2)
            i += 1
            continue
        f = _FENCE.match(lines[i])
        if f:
            j = i + 1
            while j < len(lines) and not lines[j].startswith("```"):
                j += 1
            rel = str(path.relative_to(ROOT)) if path.is_relative_to(ROOT) else path.name
            blocks.append(Block(page=rel, line=i + 1, lang=f.group(1), text="\n".join(lines[i + 1 : j]) + "\n",
                                skip=marks.get("skip"), file=marks.get("file"), output=marks.get("output"),
                                start=i + 1, end=j))
            marks = {}
            i = j + 1
            continue
        if lines[i].strip():
            marks = {}
        i += 1
    return blocks


def commands(block: Block) -> list[Command]:
    """The ``$ `` commands of a console block with the output lines shown under each."""
    out: list[Command] = []
    lines = block.text.splitlines()
    i = 0
    while i < len(lines):
        line = lines[i]
        if line.startswith("$ "):
            cmd, raw = line[2:], [line]
            while cmd.endswith("\\") and i + 1 < len(lines):
                i += 1
                raw.append(lines[i])
                cmd = cmd[:-1].rstrip() + " " + lines[i].strip()
            out.append(Command(cmd, raw))
        elif out:
            out[-1].output.append(line)
        i += 1
    return out


def environment(workdir: Path) -> dict:
    env = dict(os.environ)
    env["PATH"] = str(Path(sys.executable).parent) + os.pathsep + env.get("PATH", "")
    env.setdefault("LEADLINE_CACHE_DIR", str(workdir / ".cache"))
    env["COLUMNS"] = "100"
    return env


def run_command(cmd: str, workdir: Path, timeout: float = 600) -> subprocess.CompletedProcess:
    return subprocess.run(["bash", "-o", "pipefail", "-c", cmd], cwd=workdir, env=environment(workdir),
                          capture_output=True, text=True, timeout=timeout)


_RC = "__leadline_doc_exit__"


def run_block(cmds: list[str], workdir: Path, timeout: float = 900) -> list[tuple[int, str]]:
    """Run a block's commands in one bash session (variables carry over); (exit code, output) each.

    Output is stdout and stderr together, as a terminal shows them.
    """
    script = ["exec 2>&1", "set -o pipefail"]
    for cmd in cmds:
        # report the exit code, then restore it so that `echo $?` on the page still works
        script += [cmd, f"__rc=$?; printf '\\n{_RC} %d\\n' $__rc; ( exit $__rc )"]
    proc = subprocess.run(["bash", "-c", "\n".join(script)], cwd=workdir, env=environment(workdir),
                          capture_output=True, text=True, timeout=timeout)
    results, chunk = [], []
    for line in proc.stdout.split("\n"):
        if line.startswith(_RC + " "):
            text = "\n".join(chunk)
            results.append((int(line.split()[1]), text[:-1] if text.endswith("\n") else text))
            chunk = []
        else:
            chunk.append(line)
    while len(results) < len(cmds):
        results.append((-1, "\n".join(chunk) + proc.stderr))
    return results


def run_page(path: Path, workdir: Path, *, regenerate: bool = False) -> list[str]:
    """Run every block of a page that is not skipped; returns failure messages.

    With ``regenerate`` the output under each console command is replaced by
    what the command printed, and the page is rewritten.
    """
    failures: list[str] = []
    # snippets written to run from the repository root read tests/ data and write into docs/:
    # give them a link to the repository's tests/ and an empty docs/ here
    if not (workdir / "tests").exists():
        (workdir / "tests").symlink_to(ROOT / "tests", target_is_directory=True)
    (workdir / "docs").mkdir(exist_ok=True)
    lines = path.read_text().splitlines()
    replacements: list[tuple[int, int, list[str]]] = []
    namespace: dict = {"__name__": "__docs__"}
    for block in parse_blocks(path):
        if block.skip is not None:
            continue
        if block.file is not None:
            target = workdir / block.file
            target.parent.mkdir(parents=True, exist_ok=True)
            target.write_text(block.text)
            continue
        if block.lang == "python":
            old_dir, old_env = os.getcwd(), dict(os.environ)
            os.chdir(workdir)
            os.environ.update(environment(workdir))
            try:
                exec(compile(block.text, block.name, "exec"), namespace)
            except Exception as exc:  # report and go on with the page
                failures.append(f"{block.name}: python block raised {type(exc).__name__}: {exc}")
            finally:
                os.chdir(old_dir)
                os.environ.clear()
                os.environ.update(old_env)
            continue
        if block.lang != "console":
            continue
        new_text: list[str] = []
        cmds = commands(block)
        results = run_block([c.command for c in cmds], workdir)
        for c, (code, out) in zip(cmds, results):
            expected = 2 if c.output and c.output[0].startswith("leadline: error:") else 0
            if code != expected:
                failures.append(f"{block.name}: `{c.command}` exited {code} (expected {expected}): {out.strip()[-2000:]}")
            new_text.extend(c.raw)
            if block.output != "none" and c.output:
                new_text.extend(out.rstrip("\n").splitlines())
        replacements.append((block.start, block.end, new_text))
    if regenerate and not failures:
        for start, end, text in reversed(replacements):
            lines[start:end] = text
        path.write_text("\n".join(lines) + "\n")
    return failures


def main(argv: list[str]) -> int:
    import tempfile

    status = 0
    for name in argv:
        path = Path(name).resolve()
        with tempfile.TemporaryDirectory(prefix="leadline-docs-") as tmp:
            failures = run_page(path, Path(tmp), regenerate=True)
        for f in failures:
            print(f, file=sys.stderr)
        status |= bool(failures)
        print(f"{name}: {'regenerated' if not failures else 'NOT regenerated (failures above)'}")
    return status


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
