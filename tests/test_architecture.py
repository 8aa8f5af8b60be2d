"""The layers read in data-flow order: core → readers/diagnostics/demo_data → engine → audit → app.

The contracts live in ``pyproject.toml`` (``[tool.importlinter]``) and are
checked by import-linter, a kept library, not by a hand-written walker.
"""

from pathlib import Path

from importlinter import cli

ROOT = Path(__file__).resolve().parent.parent


def test_import_contracts_hold(capsys):
    code = cli.lint_imports(config_filename=str(ROOT / "pyproject.toml"), no_cache=True)
    out = capsys.readouterr().out
    assert code == 0, out
    assert "BROKEN" not in out
    assert out.count("KEPT") >= 4        # every contract was checked, none skipped
