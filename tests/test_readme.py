"""The README stays true: it lists every setting and its two commands exist."""

from pathlib import Path

from rolewatch.config import describe_settings

ROOT = Path(__file__).resolve().parents[1]
README = (ROOT / "README.md").read_text(encoding="utf-8")


def test_readme_lists_every_setting_with_its_default():
    for name, default, _help in describe_settings():
        row = next((line for line in README.splitlines() if line.startswith(f"| `{name}` |")), None)
        assert row is not None, (
            f"README's configuration table lacks {name}: run scripts/settings_table.py"
        )
        assert f"`{default}`" in row, f"README shows a stale default for {name}"


def test_readme_commands_exist():
    assert "./scripts/test.sh" in README and (ROOT / "scripts" / "test.sh").exists()
    assert "rolewatch demo" in README
    assert "human review" in README
