"""What an installed microsim offers: the public names are what the package docstring says
they are, every package is in the wheel, and the demo ships inside it.

References outside the project: inspect (what is a function, a class, a module), tomllib
reading pyproject.toml, pip building a real wheel and installing it into a folder of its
own; the installed demo is compared byte for byte with scenarios/lakemoor_kidney.toml.
"""
from __future__ import annotations

import json
import os
import re
import shutil
import subprocess
import sys
import tomllib
from pathlib import Path

import microsim

ROOT = Path(__file__).resolve().parent.parent
DEMO = ROOT / "scenarios" / "lakemoor_kidney.toml"

# Run in a fresh interpreter: each public name, imported as `from microsim import name`,
# before anything else is imported and again after every module of the package is.
KINDS = """
import importlib, inspect, json, pkgutil, microsim

def kinds():
    found = {}
    for name in microsim.__all__:
        namespace = {}
        exec(f"from microsim import {name}", namespace)
        value = namespace[name]
        kind = ("module" if inspect.ismodule(value) else "class" if inspect.isclass(value)
                else "function" if inspect.isfunction(value) else type(value).__name__)
        found[name] = [kind, getattr(value, "__name__", None)]
    return found

first = kinds()
for module in pkgutil.walk_packages(microsim.__path__, "microsim."):
    if not module.name.endswith("__main__"):  # that one runs the command line
        importlib.import_module(module.name)
print(json.dumps({"first": first, "after": kinds()}))
"""


def public_kinds() -> dict:
    done = subprocess.run([sys.executable, "-c", KINDS], capture_output=True, text=True,
                          timeout=120, check=True)
    return json.loads(done.stdout)


def test_every_public_name_is_what_it_says_before_and_after_importing_everything():
    kinds = public_kinds()
    values = {"CAUTION": ["str", None], "__version__": ["str", None],
              "ScenarioError": ["class", "ScenarioError"]}
    expected = {name: values.get(name, ["function", name]) for name in microsim.__all__}
    assert kinds["first"] == expected
    assert kinds["after"] == expected


def test_the_names_the_package_docstring_advertises_are_public():
    advertised = re.search(r"from microsim import (.+)", microsim.__doc__).group(1)
    names = [name.strip() for name in advertised.split(",")]
    assert names and set(names) <= set(microsim.__all__)


def test_pyproject_lists_every_package_of_the_source():
    listed = tomllib.loads((ROOT / "pyproject.toml").read_text())["tool"]["setuptools"]["packages"]
    found = {".".join(p.parent.relative_to(ROOT).parts)
             for p in (ROOT / "microsim").rglob("__init__.py")}
    assert set(listed) == found | {"microsim.examples"}


def source_copy(target: Path) -> Path:
    """The project's files without local state (virtual environment, build folders)."""
    ignore = shutil.ignore_patterns(".git", ".venv", "build", "*.egg-info", "outputs",
                                    "__pycache__", ".pytest_cache", ".hypothesis")
    return Path(shutil.copytree(ROOT, target, ignore=ignore))


def test_an_installed_wheel_finds_its_demo_from_anywhere(tmp_path):
    source = source_copy(tmp_path / "source")
    pip = [sys.executable, "-m", "pip", "--disable-pip-version-check", "-q"]
    subprocess.run([*pip, "wheel", str(source), "--no-deps", "-w", str(tmp_path / "wheel")],
                   check=True, capture_output=True, timeout=300)
    wheel = next((tmp_path / "wheel").glob("microsim-*.whl"))
    installed = tmp_path / "installed"
    subprocess.run([*pip, "install", "--no-deps", "--target", str(installed), str(wheel)],
                   check=True, capture_output=True, timeout=300)
    elsewhere = tmp_path / "elsewhere"
    elsewhere.mkdir()
    probe = ("import json, microsim; from microsim.benchmark import demo_scenario; "
             "s = demo_scenario(); print(json.dumps([microsim.__file__, str(s.source), s.title]))")
    done = subprocess.run([sys.executable, "-c", probe], cwd=elsewhere, capture_output=True,
                          text=True, timeout=120, check=True,
                          env={**os.environ, "PYTHONPATH": str(installed)})
    package, demo, title = json.loads(done.stdout)
    assert Path(package).is_relative_to(installed)  # the installed copy, not this checkout
    assert Path(demo).is_relative_to(installed / "microsim" / "examples")
    assert Path(demo).read_bytes() == DEMO.read_bytes()  # the one copy, shipped
    assert title == microsim.read_scenario(DEMO).title
