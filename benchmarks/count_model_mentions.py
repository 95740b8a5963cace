"""Count the places outside the kernel that name a model (issue 13's closing-note figure).

    python benchmarks/count_model_mentions.py [ROOT ...] [--names bsm,black76] [--files]

What it counts, per Python file under ``bindings/``, ``benchmarks/`` and ``data_gen/`` of
each checkout ROOT (default: this one), from Python's own tokenizer:

* ``identifier``: a name token that is a model name or has one as an ``_``-separated part
  (``bsm``, ``bsm_price``, ``floor_black76``, ``_bsm``);
* ``literal``: a model name as a whole word inside a string literal that is not a
  docstring (``"bsm"``, ``f"{model} ... black76"``, a dict key), each occurrence;
* not this script itself (its defaults name the models);
* ``docstring`` and ``comment``: the same whole-word occurrences in docstrings and comments
  (documentation: counted apart, not in the total).

The total ("places in code") is identifier + literal.  Model names are matched in lower
case only, so prose such as "Black-76" or "BSM" is not counted.  The names are fixed on
the command line (default bsm, black76), not read from the registry, so that the same
count runs on a checkout from before the registry existed.
"""

from __future__ import annotations

import argparse
import ast
import io
import os
import re
import sys
import tokenize

FOLDERS = ("bindings", "benchmarks", "data_gen")
KINDS = ("identifier", "literal", "docstring", "comment")
_SELF = os.path.basename(__file__)       # this script names the models as its defaults


def _docstring_lines(source: str) -> set:
    """Line numbers covered by module, class and function docstrings."""
    lines = set()
    for node in ast.walk(ast.parse(source)):
        if isinstance(node, (ast.Module, ast.ClassDef, ast.FunctionDef, ast.AsyncFunctionDef)):
            body = node.body
            if (body and isinstance(body[0], ast.Expr) and isinstance(body[0].value, ast.Constant)
                    and isinstance(body[0].value.value, str)):
                lines.update(range(body[0].lineno, body[0].end_lineno + 1))
    return lines


def count_file(path: str, names) -> dict:
    with open(path, encoding="utf-8") as f:
        source = f.read()
    word = re.compile(r"\b(?:" + "|".join(map(re.escape, names)) + r")\b")
    docs = _docstring_lines(source)
    counts = dict.fromkeys(KINDS, 0)
    string_types = {tokenize.STRING}
    if hasattr(tokenize, "FSTRING_MIDDLE"):          # Python 3.12+: f-strings are split
        string_types.add(tokenize.FSTRING_MIDDLE)
    for tok in tokenize.generate_tokens(io.StringIO(source).readline):
        if tok.type == tokenize.NAME:
            counts["identifier"] += any(part in names for part in tok.string.split("_"))
        elif tok.type in string_types:
            kind = "docstring" if tok.start[0] in docs else "literal"
            counts[kind] += len(word.findall(tok.string))
        elif tok.type == tokenize.COMMENT:
            counts["comment"] += len(word.findall(tok.string))
    return counts


def count_tree(root: str, names) -> dict:
    """{relative path: counts} for every .py file under FOLDERS with a mention."""
    found = {}
    for folder in FOLDERS:
        for dirpath, dirnames, filenames in os.walk(os.path.join(root, folder)):
            dirnames[:] = sorted(d for d in dirnames if d != "__pycache__")
            for name in sorted(filenames):
                path = os.path.join(dirpath, name)
                if name.endswith(".py") and os.path.basename(path) != _SELF:
                    c = count_file(path, names)
                    if any(c.values()):
                        found[os.path.relpath(path, root)] = c
    return found


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("roots", nargs="*",
                    default=[os.path.dirname(os.path.dirname(os.path.abspath(__file__)))])
    ap.add_argument("--names", default="bsm,black76", help="comma-separated model names")
    ap.add_argument("--files", action="store_true", help="one line per file")
    args = ap.parse_args(argv)
    names = tuple(n for n in args.names.split(",") if n)
    for root in args.roots:
        found = count_tree(root, names)
        code = {p: c["identifier"] + c["literal"] for p, c in found.items()}
        total = {k: sum(c[k] for c in found.values()) for k in KINDS}
        print(f"{root}: {sum(code.values())} places in code in "
              f"{sum(1 for v in code.values() if v)} files (identifier {total['identifier']}, "
              f"literal {total['literal']}); documentation: docstring {total['docstring']}, "
              f"comment {total['comment']}  [names: {', '.join(names)}; folders: "
              f"{', '.join(FOLDERS)}]")
        if args.files:
            for path, c in found.items():
                print(f"  {path:32s} code {code[path]:3d}  "
                      + "  ".join(f"{k} {c[k]:3d}" for k in KINDS))
    return 0


if __name__ == "__main__":
    sys.exit(main())
