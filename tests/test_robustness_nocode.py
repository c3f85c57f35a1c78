"""No code runs from data: the package never unpickles, evaluates or executes what it reads.

The check parses every module of the package (the syntax tree, so comments
and strings that merely mention these names do not count) and fails on:

* importing ``pickle``, ``cPickle``, ``_pickle``, ``dill``, ``cloudpickle``,
  ``marshal``, ``shelve`` or ``joblib``;
* calling ``eval``, ``exec``, ``compile`` or ``__import__``;
* ``yaml.load``, ``yaml.unsafe_load``, ``yaml.full_load`` (only ``yaml.safe_load`` is allowed);
* ``numpy.load`` / ``np.load`` with ``allow_pickle`` set to anything but the constant False;
* ``pandas.read_pickle``, ``torch.load``, ``subprocess`` calls with ``shell=True``.
"""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

import benchspec

PACKAGE = Path(benchspec.__file__).resolve().parent
FORBIDDEN_MODULES = {"pickle", "cPickle", "_pickle", "dill", "cloudpickle", "marshal", "shelve", "joblib"}
FORBIDDEN_CALLS = {"eval", "exec", "compile", "__import__"}
FORBIDDEN_ATTRIBUTE_CALLS = {
    ("yaml", "load"), ("yaml", "unsafe_load"), ("yaml", "full_load"), ("yaml", "load_all"),
    ("pandas", "read_pickle"), ("pd", "read_pickle"), ("torch", "load"),
    ("pickle", "load"), ("pickle", "loads"),
}


def _dotted(node: ast.AST) -> tuple[str, ...]:
    parts = []
    while isinstance(node, ast.Attribute):
        parts.append(node.attr)
        node = node.value
    if isinstance(node, ast.Name):
        parts.append(node.id)
    return tuple(reversed(parts))


def problems_in(source: str, filename: str) -> list[str]:
    """Every forbidden construct in one module's source, as 'file:line: what'."""
    tree = ast.parse(source, filename=filename)
    found = []
    for node in ast.walk(tree):
        where = f"{filename}:{getattr(node, 'lineno', '?')}"
        if isinstance(node, ast.Import):
            for alias in node.names:
                if alias.name.split(".")[0] in FORBIDDEN_MODULES:
                    found.append(f"{where}: import {alias.name}")
        elif isinstance(node, ast.ImportFrom):
            if node.module and node.module.split(".")[0] in FORBIDDEN_MODULES:
                found.append(f"{where}: from {node.module} import ...")
        elif isinstance(node, ast.Call):
            name = _dotted(node.func)
            if len(name) == 1 and name[0] in FORBIDDEN_CALLS:
                found.append(f"{where}: call to {name[0]}()")
            if len(name) >= 2 and name[-2:] in FORBIDDEN_ATTRIBUTE_CALLS:
                found.append(f"{where}: call to {'.'.join(name)}()")
            if name[-2:] in (("np", "load"), ("numpy", "load")):
                for keyword in node.keywords:
                    if keyword.arg == "allow_pickle" and not (
                        isinstance(keyword.value, ast.Constant) and keyword.value.value is False
                    ):
                        found.append(f"{where}: numpy.load with allow_pickle not False")
            if name and name[0] == "subprocess":
                for keyword in node.keywords:
                    if keyword.arg == "shell" and not (
                        isinstance(keyword.value, ast.Constant) and keyword.value.value is False
                    ):
                        found.append(f"{where}: subprocess call with shell=True")
    return found


def test_package_runs_no_code_from_data():
    files = sorted(PACKAGE.rglob("*.py"))
    assert len(files) > 10  # the scan really sees the package
    problems = []
    for path in files:
        problems += problems_in(path.read_text(encoding="utf-8"), str(path.relative_to(PACKAGE.parent)))
    assert not problems, "code could run from data:\n" + "\n".join(problems)


@pytest.mark.parametrize(
    "snippet",
    [
        "import pickle",
        "from pickle import loads",
        "import dill as d",
        "x = eval(text)",
        "exec(code)",
        "yaml.load(stream)",
        "import numpy as np\nnp.load(path, allow_pickle=True)",
        "numpy.load(path, allow_pickle=flag)",
        "pd.read_pickle(path)",
        "subprocess.run(cmd, shell=True)",
    ],
)
def test_the_scan_catches_each_forbidden_construct(snippet):
    assert problems_in(snippet, "snippet.py")


@pytest.mark.parametrize(
    "snippet",
    [
        "# pickle is not used here\nx = 1",
        "message = 'never eval() user data'",
        "yaml.safe_load(stream)",
        "np.load(path, allow_pickle=False)",
        "np.load(path)",  # numpy's default is allow_pickle=False
        "model.evaluate(x)",
    ],
)
def test_the_scan_allows_safe_code(snippet):
    assert not problems_in(snippet, "snippet.py")


def test_saved_arrays_cannot_carry_pickles(tmp_path):
    """numpy refuses an object array saved with a pickle when allow_pickle is False (the package's setting)."""
    import numpy as np

    path = tmp_path / "evil.npy"
    np.save(path, np.array([{"a": 1}], dtype=object), allow_pickle=True)
    with pytest.raises(ValueError, match="allow_pickle"):
        np.load(path, allow_pickle=False)
