"""The package's rooms keep their doors: the core is pure, the edges do not reach into each other.

Dependencies point one way (DEVELOPERS.md): cli -> commands -> io, ui, pipeline, logsession,
advice -> core -> model, units, errors.  Each check imports modules in a fresh interpreter and
looks at what was loaded (``sys.modules``), or reads the import statements of the source.
"""
import ast
import os
import pkgutil
import subprocess
import sys

import pytest

import tickscope
import tickscope.core

PKG = os.path.dirname(tickscope.__file__)
IO_LIBRARIES = ("sounddevice", "soundfile", "rich", "matplotlib", "sqlite3")
CORE_MODULES = sorted(m.name for m in pkgutil.iter_modules(tickscope.core.__path__) if not m.name.startswith("_"))


def _loaded_after(modules: list[str]) -> list[str]:
    code = (f"import sys, importlib\nfor m in {modules!r}: importlib.import_module(m)\n"
            f"print(','.join(sorted(m for m in sys.modules if m.split('.')[0] in {IO_LIBRARIES!r} "
            "or m.startswith(('tickscope.io', 'tickscope.ui', 'tickscope.cli', 'tickscope.commands')))))")
    r = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    return [m for m in r.stdout.strip().split(",") if m]


def test_the_core_has_modules_to_check():
    # the walk below must see the whole core (a rename must not empty it)
    assert {"detect", "grid", "acquire", "rate", "diagnose", "soundkind", "simulate"} <= set(CORE_MODULES)


@pytest.mark.parametrize("name", CORE_MODULES)
def test_core_module_imports_no_io_ui_or_cli(name):
    assert _loaded_after([f"tickscope.core.{name}"]) == []


def test_the_pipeline_and_the_advice_are_pure_too():
    assert _loaded_after(["tickscope.pipeline", "tickscope.advice", "tickscope.export", "tickscope.model"]) == []


def test_importing_tickscope_does_nothing_heavy():
    code = "import sys, tickscope; print(sorted(m for m in sys.modules if m.startswith(('numpy', 'scipy', 'tickscope.'))))"
    r = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert r.stdout.strip() == "[]"


def _imports_of(path: str) -> set[str]:
    """Absolute names of the tickscope modules a source file imports (relative imports resolved)."""
    rel = os.path.relpath(path, os.path.dirname(PKG))[:-3].replace(os.sep, ".")
    pkg = rel.rsplit(".", 1)[0] if not rel.endswith("__init__") else rel[: -len(".__init__")]
    out = set()
    for node in ast.walk(ast.parse(open(path).read())):
        if isinstance(node, ast.ImportFrom):
            if node.level:
                base = pkg.split(".")
                base = base[: len(base) - node.level + 1]
                mod = ".".join(base + ([node.module] if node.module else []))
            else:
                mod = node.module or ""
            out.add(mod)
            out.update(f"{mod}.{a.name}" for a in node.names)
        elif isinstance(node, ast.Import):
            out.update(a.name for a in node.names)
    return {m for m in out if m.startswith("tickscope")}


def _sources(sub: str):
    root = os.path.join(PKG, sub)
    return [os.path.join(root, f) for f in sorted(os.listdir(root)) if f.endswith(".py")]


@pytest.mark.parametrize("sub,forbidden", [
    ("io", ("tickscope.ui", "tickscope.cli", "tickscope.commands", "tickscope.pipeline", "tickscope.core")),
    ("ui", ("tickscope.io", "tickscope.cli", "tickscope.commands", "tickscope.pipeline", "tickscope.core")),
    ("core", ("tickscope.io", "tickscope.ui", "tickscope.cli", "tickscope.commands", "tickscope.pipeline",
              "tickscope.advice", "tickscope.logsession")),
])
def test_edges_exchange_only_model_objects(sub, forbidden):
    bad = {os.path.basename(p): sorted(m for m in _imports_of(p) if m.startswith(forbidden)) for p in _sources(sub)}
    assert {k: v for k, v in bad.items() if v} == {}


def test_nothing_imports_the_cli():
    users = [p for sub in ("core", "io", "ui", "commands") for p in _sources(sub)
             if any(m == "tickscope.cli" or m.startswith("tickscope.cli.") for m in _imports_of(p))]
    assert users == []


def test_core_messages_name_no_command_line_option():
    # only tickscope/advice.py and the commands may name an option (--clock-ppm, --channel, ...)
    import re

    hits = []
    for p in _sources("core"):
        for node in ast.walk(ast.parse(open(p).read())):
            if isinstance(node, ast.Constant) and isinstance(node.value, str) and re.search(r"(^|\s)--[a-z]", node.value):
                hits.append((os.path.basename(p), node.value[:60]))
    assert hits == []


def test_package_ships_type_information():
    assert os.path.exists(os.path.join(PKG, "py.typed"))
