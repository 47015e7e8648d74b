"""The README's reference stays true: every setting is documented, the test command is CI's."""

from conftest import ROOT

from runner.evidence.flags import LEGEND
from runner.recipe.loader import DIAGNOSTICS
from runner.recipe.settings import all_paths


def test_readme_documents_every_setting():
    readme = (ROOT / "README.md").read_text()
    missing = [p for p in all_paths() if f"`{p}`" not in readme]
    assert not missing, missing


def test_readme_documents_every_flag_and_threshold():
    readme = (ROOT / "README.md").read_text()
    missing = [name for name in [*LEGEND, *DIAGNOSTICS] if f"`{name}`" not in readme]
    assert not missing, missing


def test_ci_runs_the_readme_test_command():
    readme = (ROOT / "README.md").read_text()
    command = 'python -m pip install -c constraints.txt -e ".[test]" && python -m pytest'
    assert command in readme
    assert command in (ROOT / ".ci" / "run").read_text()


def test_developers_layout_matches_the_tree():
    """DEVELOPERS.md's layout block names every module under runner/, and only those."""
    text = (ROOT / "DEVELOPERS.md").read_text()
    block = text.split("<!-- layout:", 1)[1].split("```", 2)[1]
    listed, package = set(), ""
    for line in block.splitlines():
        name = line.strip().split(" ", 1)[0] if line.strip() else ""
        if not name or not (name.endswith(".py") or name.endswith("/")):
            continue
        if not line.startswith(" ") and name.endswith("/"):
            package = name
        elif not line.startswith(" "):
            package = ""
            listed.add(name)
        else:
            listed.add(package + name)
    actual = {str(p.relative_to(ROOT / "runner")) for p in (ROOT / "runner").rglob("*.py")}
    actual = {p for p in actual if not (p.endswith("__init__.py") and p != "__init__.py") or p == "cli/__init__.py"}
    assert listed == actual, (sorted(actual - listed), sorted(listed - actual))
