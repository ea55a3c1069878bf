"""Write (or check) the recipe reference table in README.md from the recipe schema itself.

    python tools/recipe_reference.py          # rewrite the table between the markers
    python tools/recipe_reference.py --check  # exit 1 when the README is out of date
"""
from __future__ import annotations

import sys
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))
from align.recipe import describe_fields  # noqa: E402

README = Path(__file__).resolve().parent.parent / "README.md"
START, END = "<!-- recipe-reference:start -->", "<!-- recipe-reference:end -->"


def table() -> str:
    rows = ["| key | default | meaning |", "| --- | --- | --- |"]
    rows += [f"| `{key}` | `{default}` | {doc} |" for key, default, doc in describe_fields()]
    return "\n".join(rows)


def render(text: str) -> str:
    head, rest = text.split(START, 1)
    _, tail = rest.split(END, 1)
    return f"{head}{START}\n{table()}\n{END}{tail}"


if __name__ == "__main__":
    current = README.read_text(encoding="utf-8")
    wanted = render(current)
    if "--check" in sys.argv:
        sys.exit(0 if wanted == current else 1)
    README.write_text(wanted, encoding="utf-8")
