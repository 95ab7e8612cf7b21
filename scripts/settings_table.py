"""Print the README's configuration table from the settings model (one row per option)."""

from rolewatch.config import describe_settings

print("| variable | default | meaning |")
print("|---|---|---|")
for name, default, help_text in describe_settings():
    print(f"| `{name}` | `{default}` | {help_text} |")
