"""docs/cli.md cannot go stale: every command and every option `--help` shows is documented there.

The command definitions (the typer app of jobs/cli.py) are the source: a new command without a
``## `leadline NAME` `` section, or a new option missing from its command's section, fails here.
The pasted `--help` texts are regenerated from a real run with
``.venv/bin/python -m leadline.tests.doc_examples docs/cli.md``.  The renamed options and spec
keys are refused with their new name (jobs/renames.py): checked here for every rename.
"""

from __future__ import annotations

import re
from pathlib import Path

import pytest
import typer

from leadline.jobs.cli import app
from leadline.jobs.renames import RENAMED_OPTIONS, RENAMED_SPEC_KEYS

CLI_PAGE = Path(__file__).resolve().parent.parent / "docs" / "cli.md"


def _commands() -> dict:
    group = typer.main.get_command(app)
    return {name: cmd for name, cmd in group.commands.items() if not getattr(cmd, "hidden", False)}


def _shown_options(cmd) -> list[str]:
    """Every option string `leadline CMD --help` lists (long and short spellings)."""
    out = []
    for param in cmd.params:
        if getattr(param, "param_type_name", "") != "option" or getattr(param, "hidden", False):
            continue
        out.extend(param.opts)
        out.extend(param.secondary_opts)
    return out


def _sections() -> dict[str, str]:
    """docs/cli.md cut at its '## ' headings: heading line -> text of the section."""
    parts = re.split(r"^(## .*)$", CLI_PAGE.read_text(), flags=re.M)
    return {parts[i]: parts[i + 1] for i in range(1, len(parts) - 1, 2)}


def _section_of(name: str) -> str:
    found = [text for heading, text in _sections().items() if f"`leadline {name}`" in heading]
    assert found, f"docs/cli.md has no '## ... `leadline {name}`' section for the command {name!r}"
    return found[0]


def test_every_command_has_a_section_in_cli_md():
    missing = [name for name in _commands() if not any(f"`leadline {name}`" in h for h in _sections())]
    assert not missing, f"commands without a section in docs/cli.md: {missing}"


@pytest.mark.parametrize("name", sorted(_commands()))
def test_every_option_of_the_command_is_in_its_section(name):
    text = _section_of(name)
    missing = [opt for opt in _shown_options(_commands()[name])
               if not re.search(rf"(?<![\w-]){re.escape(opt)}(?![\w-])", text)]
    assert not missing, f"`leadline {name}` options missing from its section of docs/cli.md: {missing}"


def test_the_check_notices_an_undocumented_option():
    """The check above is not vacuous: an option no page mentions is reported."""
    import click

    cmd = click.Command("evaluate", params=[click.Option(["--surely-not-documented"])])
    text = _section_of("evaluate")
    assert "--surely-not-documented" not in text
    assert _shown_options(cmd) == ["--surely-not-documented"]


def test_the_glossary_names_every_renamed_spelling():
    """The glossary is where the one name of each concept is written down, old spellings beside it."""
    text = CLI_PAGE.read_text()
    glossary = text[text.index("## Glossary"):]
    for old, new in RENAMED_OPTIONS.items():
        assert new in glossary and old in glossary, (old, new)
    for (_section, old), new in RENAMED_SPEC_KEYS.items():
        assert new in glossary, new


# ------------------------------------------------------------------ renamed spellings
def _run(args: list[str], capsys) -> tuple[int, str, str]:
    from leadline.jobs.cli import main

    with pytest.raises(SystemExit) as exit_info:
        main(args)
    captured = capsys.readouterr()
    return exit_info.value.code, captured.out, captured.err


RENAMED_USES = {
    "--cluster-config": ["evaluate", "--xi", "2:0.5", "--gamma", "0.5", "--beta", "0.4", "--cluster-config", "x.toml"],
    "--gtol": ["optimize", "--xi", "2:0.5", "--depth", "1", "--gtol", "1e-6"],
    "--maxiter": ["optimize", "--xi", "2:0.5", "--depth", "1", "--maxiter=20"],
    "--memory-mb": ["evaluate", "--xi", "2:0.5", "--gamma", "0.5", "--beta", "0.4", "--memory-mb", "64"],
    "--xorsat": ["evaluate", "--xorsat", "3", "--degree", "4", "--gamma", "0.5", "--beta", "0.4"],
}


def test_every_renamed_option_has_a_use_here():
    assert set(RENAMED_USES) == set(RENAMED_OPTIONS)


@pytest.mark.parametrize("old", sorted(RENAMED_OPTIONS))
def test_old_option_is_refused_with_its_new_name(old, tmp_path, monkeypatch, capsys):
    monkeypatch.chdir(tmp_path)
    code, out, err = _run(RENAMED_USES[old], capsys)
    lines = err.strip().splitlines()
    assert code == 2 and out == ""
    assert len(lines) == 1 and lines[0].startswith("leadline: error:"), err
    assert old in lines[0] and RENAMED_OPTIONS[old] in lines[0]
    assert list(tmp_path.iterdir()) == []


def test_resume_refuses_the_old_batch_option(tmp_path, capsys):
    code, _out, err = _run(["resume", str(tmp_path / "s.zarr"), "--cluster-config", "x.toml"], capsys)
    assert code == 2 and "--batch-file" in err and len(err.strip().splitlines()) == 1


SPEC = """
[study]
name = "renames"
store = "renames.zarr"
[depths]
pmax = 1
[{section}]
{key} = {value}
[[ensemble]]
label = "sk"
xi = "2:0.5"
"""

OLD_VALUES = {"cluster-config": '"batch.toml"', "memory-mb": "64", "gtol": "1e-6", "maxiter": "100"}


@pytest.mark.parametrize("section,old", sorted(RENAMED_SPEC_KEYS))
def test_old_spec_key_is_refused_with_its_new_name(section, old, tmp_path, monkeypatch, capsys):
    monkeypatch.chdir(tmp_path)
    (tmp_path / "study.toml").write_text(SPEC.format(section=section, key=old, value=OLD_VALUES[old]))
    code, out, err = _run(["sweep", "study.toml", "--quiet"], capsys)
    lines = err.strip().splitlines()
    assert code == 2 and out == "" and len(lines) == 1, err
    assert f"[{section}] {old}" in lines[0] and RENAMED_SPEC_KEYS[(section, old)] in lines[0]
    assert sorted(p.name for p in tmp_path.iterdir()) == ["study.toml"]


def test_new_spec_keys_are_accepted(tmp_path):
    from leadline.jobs.spec import load_spec

    (tmp_path / "study.toml").write_text(
        SPEC.format(section="optimizer", key="gradient-tol", value="1e-6").replace(
            "[[ensemble]]", "max-iterations = 100\n[compute]\nmemory-mib = 64\n[[ensemble]]"))
    spec = load_spec(tmp_path / "study.toml")
    assert (spec.gradient_tol, spec.max_iterations, spec.memory_mib) == (1e-6, 100, 64.0)
    assert spec.to_json()["optimizer"] == {"restarts": None, "seed": 0, "gradient_tol": 1e-6, "max_iterations": 100}


def test_old_batch_file_key_is_refused_with_its_new_name(tmp_path):
    from leadline.cluster.batch import BatchConfigError, load_batch_config

    path = tmp_path / "batch.toml"
    path.write_text('system = "slurm"\nwait-for-workers = 60\n')
    with pytest.raises(BatchConfigError, match="wait-for-workers is now called wait-for-workers-s"):
        load_batch_config(path)
    path.write_text('system = "slurm"\nwait-for-workers-s = 60\n')
    assert load_batch_config(path).wait_for_workers_s == 60.0


@pytest.mark.parametrize("value", ["scheduler", "batch"])
def test_executor_takes_the_spec_values_on_the_command_line(value, capsys):
    """One set of --executor values everywhere; the address or file comes from its own option."""
    code, _out, err = _run(["evaluate", "--xi", "2:0.5", "--gamma", "0.5", "--beta", "0.4", "--executor", value], capsys)
    needed = {"scheduler": "--scheduler", "batch": "--batch-file"}[value]
    assert code == 2 and f"--executor {value} needs {needed}" in err


def test_table_and_plot_take_dash_o():
    for name in ("table", "plot", "optimize", "transfer"):
        assert "-o" in _shown_options(_commands()[name]), name


def _pasted_help() -> list:
    """Every `$ leadline ... --help` of docs/cli.md with the output pasted under it."""
    from . import doc_examples as D

    return [pytest.param(cmd, id=cmd.command) for block in D.parse_blocks(CLI_PAGE)
            if block.lang == "console" and block.skip is None
            for cmd in D.commands(block) if cmd.command.startswith("leadline ") and cmd.command.endswith(" --help")]


@pytest.mark.parametrize("cmd", _pasted_help())
def test_pasted_help_is_what_the_command_prints_now(cmd, tmp_path):
    """A help text changed in the code but not regenerated on the page (it happened: an option's
    default described for one ensemble kind only) fails here; regenerate with
    ``.venv/bin/python -m leadline.tests.doc_examples docs/cli.md``."""
    from . import doc_examples as D

    [(rc, printed)] = D.run_block([cmd.command], tmp_path)
    shown = "\n".join(cmd.output).rstrip("\n")
    assert rc == 0 and printed.rstrip("\n") == shown, f"docs/cli.md: the output under `$ {cmd.command}` is stale"


def test_pasted_help_check_finds_every_command_s_help():
    assert len(_pasted_help()) == len(_commands()) == 10
