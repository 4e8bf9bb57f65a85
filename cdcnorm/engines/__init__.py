"""Execution engines, one file each, looked up by name: ``engines/<name>.py`` defines ``ENGINE``.

A module is imported when its engine is first asked for, so a DuckDB run does not import the
Spark adapter (nor sqlglot, which only another engine and ``--show-plan`` need)."""

from __future__ import annotations

from collections.abc import Callable
from importlib import import_module
from typing import TYPE_CHECKING, Any

from cdcnorm.errors import UsageError, did_you_mean

if TYPE_CHECKING:
    from sqlglot import exp

#: the engines' names, as ``--show-plan`` takes them
ENGINES = ("duckdb", "spark")


def engine_class(name: str) -> Any:
    """The engine class of ``name`` (its module's ``ENGINE``)."""
    if name not in ENGINES:
        raise UsageError(
            f"unknown engine {name!r}{did_you_mean(name, ENGINES)}", expected=" or ".join(ENGINES)
        )
    return import_module(f"cdcnorm.engines.{name}").ENGINE


def renderer(name: str) -> Callable[[exp.Expr], str]:
    """How the engine ``name`` writes a plan step as SQL for people (no session needed)."""
    render: Callable[[exp.Expr], str] = engine_class(name).pretty
    return render


__all__ = ["ENGINES", "engine_class", "renderer"]
