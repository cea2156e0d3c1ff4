"""House rules a newcomer can rely on: no function in the library is longer than a screen."""

import ast
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
LIMIT = 60  # lines per function, decorators and docstring included (our own rule)


def long_functions() -> list[str]:
    found = []
    for package in ("ablate", "toy_corpus"):
        for path in sorted((ROOT / package).rglob("*.py")):
            for node in ast.walk(ast.parse(path.read_text(), filename=str(path))):
                if isinstance(node, (ast.FunctionDef, ast.AsyncFunctionDef)):
                    start = min([node.lineno] + [d.lineno for d in node.decorator_list])
                    length = node.end_lineno - start + 1
                    if length > LIMIT:
                        found.append(f"{path.relative_to(ROOT)}:{node.lineno} {node.name} ({length} lines)")
    return found


def test_no_function_is_longer_than_a_screen():
    assert long_functions() == []
