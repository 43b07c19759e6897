"""Finding recipes by name.

Built-in recipes live in the ``recipes`` folder shipped with the workbench; a
user adds folders with ``--recipes DIR`` or the ``WORKBENCH_RECIPES``
environment variable (folders separated by the path separator). Every folder
loads the same way: each ``*.py`` file that defines ``RECIPE`` is a recipe. A
file that fails to load is reported with its file and line; the others still
load.
"""

from __future__ import annotations

import hashlib
import importlib.util
import os
import sys
import traceback
from dataclasses import dataclass, field, replace
from pathlib import Path

from workbench.errors import OptionError, did_you_mean
from workbench.recipe import Recipe

ENV_VAR = "WORKBENCH_RECIPES"


@dataclass(frozen=True)
class LoadProblem:
    path: str
    line: int | None
    message: str

    def __str__(self) -> str:
        where = f"{self.path}:{self.line}" if self.line else self.path
        return f"{where}: {self.message}"


@dataclass
class Registry:
    recipes: dict[str, Recipe] = field(default_factory=dict)
    problems: list[LoadProblem] = field(default_factory=list)

    def get(self, name: str) -> Recipe:
        if name in self.recipes:
            return self.recipes[name]
        hint = did_you_mean(name, self.recipes)
        broken = [p for p in self.problems if Path(p.path).stem.replace("_", "-") == name]
        if broken:
            raise OptionError(f"recipe '{name}' failed to load: {broken[0]}")
        raise OptionError(
            f"unknown recipe '{name}'{hint} (known: {', '.join(sorted(self.recipes)) or 'none'})"
        )


def builtin_folder() -> Path:
    import recipes

    return Path(recipes.__file__).parent


def user_folders(extra: list[str] | None = None) -> list[Path]:
    folders = [Path(p) for p in (extra or [])]
    env = os.environ.get(ENV_VAR, "")
    folders += [Path(p) for p in env.split(os.pathsep) if p.strip()]
    return folders


def load(extra_folders: list[str] | None = None) -> Registry:
    """Load the built-in recipes, then each user folder in order."""
    registry = Registry()
    for folder in [builtin_folder(), *user_folders(extra_folders)]:
        _load_folder(folder, registry)
    return registry


def _load_folder(folder: Path, registry: Registry) -> None:
    if not folder.is_dir():
        registry.problems.append(LoadProblem(str(folder), None, "recipe folder not found"))
        return
    for path in sorted(folder.glob("*.py")):
        if path.name.startswith("_"):
            continue
        try:
            module = load_module(path)
        except (Exception, SystemExit) as err:  # any error in user code, or sys.exit: report it, keep going
            registry.problems.append(_problem(path, err))
            continue
        recipe = getattr(module, "RECIPE", None)
        if recipe is None:
            continue
        if not isinstance(recipe, Recipe):
            registry.problems.append(
                LoadProblem(str(path), None, "RECIPE is not a workbench.recipe.Recipe")
            )
            continue
        if recipe.name in registry.recipes:
            registry.problems.append(
                LoadProblem(str(path), None, f"recipe name '{recipe.name}' is already taken")
            )
            continue
        registry.recipes[recipe.name] = replace(recipe, source=str(path))


_MODULES: dict[str, object] = {}


def recipe_from_file(source: str, name: str) -> Recipe:
    """The recipe ``name`` defined in file ``source`` (loaded once per process)."""
    module = load_module(Path(source))
    recipe = getattr(module, "RECIPE", None)
    if not isinstance(recipe, Recipe) or recipe.name != name:
        raise OptionError(f"{source}: expected RECIPE named '{name}'")
    return replace(recipe, source=str(source))


def load_module(path: Path):
    """Import a Python file by path under a private module name.

    Once per process and file content: a file edited since it was loaded
    (say, between two checks in one notebook session) is loaded afresh.
    """
    key = f"{path.resolve()}:{hashlib.sha1(path.read_bytes()).hexdigest()}"
    if key in _MODULES:
        return _MODULES[key]
    digest = hashlib.sha1(key.encode()).hexdigest()[:12]
    name = f"_workbench_user_{digest}_{path.stem}"
    spec = importlib.util.spec_from_file_location(name, path)
    module = importlib.util.module_from_spec(spec)
    sys.modules[name] = module
    try:
        spec.loader.exec_module(module)
    except BaseException:
        sys.modules.pop(name, None)
        raise
    _MODULES[key] = module
    return module


def _problem(path: Path, err: BaseException) -> LoadProblem:
    if isinstance(err, SyntaxError):
        return LoadProblem(str(path), err.lineno, f"SyntaxError: {err.msg}")
    line = None
    for frame in traceback.extract_tb(err.__traceback__):
        if Path(frame.filename).resolve() == path.resolve():
            line = frame.lineno
    if isinstance(err, SystemExit):
        return LoadProblem(str(path), line, f"called sys.exit({err.code!r}) while loading")
    return LoadProblem(str(path), line, f"{type(err).__name__}: {err}")
