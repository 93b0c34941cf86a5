"""The README stays in step with the code it documents."""

from pathlib import Path

from backreact.config import config_reference_markdown

ROOT = Path(__file__).resolve().parents[1]


def test_readme_contains_the_current_config_reference():
    # The README's configuration reference is generated from the schema; regenerate it
    # when keys change (the table body must appear verbatim).
    body = config_reference_markdown().replace("# Configuration reference", "").strip()
    assert body in (ROOT / "README.md").read_text()


def test_ci_runs_exactly_the_readme_test_command():
    readme = (ROOT / "README.md").read_text()
    ci = (ROOT / ".ci" / "run").read_text().strip().splitlines()[-1]
    assert ci in readme and "pytest" in ci


def test_readme_documents_every_command():
    # a verb added to the command line must be documented in the README's usage block
    import typer

    from backreact.cli import app

    names = typer.main.get_command(app).commands
    readme = (ROOT / "README.md").read_text()
    missing = [name for name in names if f"backreact {name} " not in readme]
    assert not missing, f"README does not show: {missing}"
