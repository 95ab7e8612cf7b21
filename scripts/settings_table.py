"""Print the README's configuration table from the settings model, or rewrite it in place.

python scripts/settings_table.py            # print the table
python scripts/settings_table.py --update   # replace the table in README.md
"""

import sys
from pathlib import Path

from rolewatch.config import describe_settings

HEADER = "| variable | default | meaning |"


def table() -> list[str]:
    rows = [HEADER, "|---|---|---|"]
    for name, default, help_text in describe_settings():
        rows.append(f"| `{name}` | `{default}` | {help_text} |")
    return rows


def update(readme: Path) -> None:
    lines = readme.read_text(encoding="utf-8").split("\n")
    start = lines.index(HEADER)
    end = start
    while end < len(lines) and lines[end].startswith("|"):
        end += 1
    lines[start:end] = table()
    readme.write_text("\n".join(lines), encoding="utf-8")


if __name__ == "__main__":
    if "--update" in sys.argv:
        update(Path(__file__).resolve().parents[1] / "README.md")
    else:
        print("\n".join(table()))
