"""The shape of the public API: no function takes more than about eight parameters.

Functions past the limit are listed below as known debt, each with the values its
parameters should be grouped into; a new function past the limit fails here, and a
listed one that is slimmed down must leave the list.
"""

import ast
from pathlib import Path

PACKAGE = Path(__file__).resolve().parents[1] / "screener"
LIMIT = 8

#: function -> its parameter count today (known debt; shrink, never grow)
KNOWN_WIDE = {
    # scikit-learn estimators keep every parameter explicit (kept on purpose)
    "models.point_process.PointProcessNiche.__init__": 10,
}


def _wide_functions():
    found = {}
    for path in sorted(PACKAGE.rglob("*.py")):
        module = ".".join(path.relative_to(PACKAGE).with_suffix("").parts)
        tree = ast.parse(path.read_text(encoding="utf-8"))
        scopes = [(node, "") for node in tree.body]
        while scopes:
            node, prefix = scopes.pop()
            if isinstance(node, ast.ClassDef) and not node.name.startswith("_"):
                scopes += [(n, f"{prefix}{node.name}.") for n in node.body]
            elif isinstance(node, (ast.FunctionDef, ast.AsyncFunctionDef)):
                public = not node.name.startswith("_") or node.name == "__init__"
                a = node.args
                names = [x.arg for x in a.posonlyargs + a.args + a.kwonlyargs]
                names = [n for n in names if n not in ("self", "cls")]
                count = len(names) + (a.vararg is not None) + (a.kwarg is not None)
                if public and count > LIMIT:
                    found[f"{module}.{prefix}{node.name}"] = count
    return found


def test_no_new_function_takes_more_than_eight_parameters():
    wide = _wide_functions()
    new = {k: v for k, v in wide.items() if k not in KNOWN_WIDE}
    assert not new, (
        f"functions with more than {LIMIT} parameters: {new}; group related ones into a "
        "frozen value (see DEVELOPERS.md)"
    )
    grown = {k: (KNOWN_WIDE[k], v) for k, v in wide.items()
             if k in KNOWN_WIDE and v > KNOWN_WIDE[k]}
    assert not grown, f"known wide functions grew (was, now): {grown}"


def test_slimmed_functions_leave_the_debt_list():
    wide = _wide_functions()
    gone = sorted(set(KNOWN_WIDE) - set(wide))
    assert not gone, f"no longer wide, remove from KNOWN_WIDE: {gone}"
