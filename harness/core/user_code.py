"""Importing a user's function named as ``python:package.module:name`` (one-line errors).

A scenario names user code by module and attribute: a theory (``theory.source``) or a data
factory (``data.kind``). The module must be installed or importable from the working
directory. The working directory is put on the module search path only for the moment of
the import, after the installed packages (a local file never shadows one), and taken off
again: the caller's ``sys.path`` is left as it was.
"""

from __future__ import annotations

import importlib
import os
import sys
from collections.abc import Callable
from typing import Any

from harness.core.scenario import ScenarioError


def describe_error(error: BaseException) -> str:
    """``ValueError: first line of the message`` for one-line reports of user exceptions."""
    text = str(error).strip().splitlines()
    return f"{type(error).__name__}: {text[0]}" if text else type(error).__name__


def split_python_target(spec: str, key: str, what: str) -> tuple[str, str]:
    """``"python:package.module:name"`` -> ``("package.module", "name")``, or a one-line error."""
    body = spec[len("python:"):] if spec.startswith("python:") else spec
    module, sep, name = body.rpartition(":")
    if not sep or not module or not name or not name.isidentifier() or not all(
        part.isidentifier() for part in module.split(".")
    ):
        raise ScenarioError(f"scenario key '{key}': expected 'python:package.module:{what}', got {spec!r}")
    return module, name


def _import(module_name: str) -> Any:
    """Import a module, with the working directory searched last for just this import."""
    cwd = os.getcwd()
    added = cwd not in sys.path and "" not in sys.path
    if added:
        sys.path.append(cwd)
    try:
        return importlib.import_module(module_name)
    finally:
        if added and cwd in sys.path:
            sys.path.remove(cwd)


def load_user_callable(spec: str, key: str, what: str) -> Callable[..., Any]:
    """Import the callable a ``python:package.module:name`` spec names (one-line errors)."""
    module_name, name = split_python_target(spec, key, what)
    try:
        module = _import(module_name)
    except ModuleNotFoundError as error:
        raise ScenarioError(
            f"scenario key '{key}': cannot import module '{module_name}' ({error}); "
            "it must be installed or importable from the working directory"
        ) from None
    except Exception as error:  # the user's module raised while being imported
        raise ScenarioError(
            f"scenario key '{key}': importing module '{module_name}' raised {describe_error(error)}"
        ) from None
    target = getattr(module, name, None)
    if target is None:
        raise ScenarioError(f"scenario key '{key}': module '{module_name}' has no {what} '{name}'")
    if not callable(target):
        raise ScenarioError(
            f"scenario key '{key}': '{module_name}.{name}' is a {type(target).__name__}, expected a {what}"
        )
    return target
