"""The README's reference stays true: every setting is documented, the test command is CI's."""

from conftest import ROOT

from runner.recipe.settings import all_paths


def test_readme_documents_every_setting():
    readme = (ROOT / "README.md").read_text()
    missing = [p for p in all_paths() if f"`{p}`" not in readme]
    assert not missing, missing


def test_ci_runs_the_readme_test_command():
    readme = (ROOT / "README.md").read_text()
    command = 'python -m pip install -c constraints.txt -e ".[test]" && python -m pytest'
    assert command in readme
    assert command in (ROOT / ".ci" / "run").read_text()
