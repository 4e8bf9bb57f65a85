"""The dependency ranges pyproject.toml declares are the ones the suite is run on: every lower bound
is pinned in .ci/oldest.txt, which .ci/run installs to run the suite a second time. (Requirements
are read with ``packaging``, the reference implementation of PEP 508 and PEP 440.)"""

from __future__ import annotations

import subprocess
import sys
import tomllib
from pathlib import Path

from packaging.requirements import Requirement
from packaging.utils import canonicalize_name

from tests.conftest import ROOT


def _lower_bounds() -> dict[str, str]:
    """{package: its lower bound} of every runtime dependency; each must have exactly one, ``>=``."""
    project = tomllib.loads((ROOT / "pyproject.toml").read_text(encoding="utf-8"))["project"]
    bounds = {}
    for text in project["dependencies"]:
        req = Requirement(text)
        (spec,) = req.specifier
        assert spec.operator == ">=", f"{text}: a lower bound only, so that the oldest can be tested"
        bounds[canonicalize_name(req.name)] = spec.version
        for extra in req.extras:  # psycopg[binary] brings psycopg-binary of the same version
            bounds[canonicalize_name(f"{req.name}-{extra}")] = spec.version
    return bounds


def _pins() -> dict[str, str]:
    pins = {}
    for line in (ROOT / ".ci" / "oldest.txt").read_text(encoding="utf-8").splitlines():
        if line.strip() and not line.startswith("#"):
            req = Requirement(line)
            (spec,) = req.specifier
            assert spec.operator == "==", line
            pins[canonicalize_name(req.name)] = spec.version
    return pins


def test_every_lower_bound_is_the_version_the_oldest_run_pins() -> None:
    assert _pins() == _lower_bounds()


def test_the_engine_refuses_what_pyproject_would_not_install() -> None:
    from cdcnorm.engines.duckdb import OLDEST_DUCKDB, OLDEST_SQLGLOT

    bounds = _lower_bounds()
    assert bounds["duckdb"] == ".".join(map(str, OLDEST_DUCKDB))
    assert bounds["sqlglot"] == ".".join(map(str, OLDEST_SQLGLOT))


def test_a_conversion_imports_neither_sqlglot_nor_the_spark_adapter_nor_pandas(tmp_path: Path) -> None:
    """A DuckDB conversion runs its plan's text as written: sqlglot (a fifth of a second to import)
    is for another engine, --show-plan and lineage. pandas (as long) is for the library's
    DataFrames: pyarrow imports it when an array is built with ``pa.array``, which the readers do
    not call. The demo (CSV and JSON Lines files) converted in a fresh interpreter."""
    code = (
        "import sys; from cdcnorm.cli import main; "
        f"code = main(['convert', {str(ROOT / 'examples' / 'dumps')!r}, '--mappings', "
        f"{str(ROOT / 'mappings')!r}, '--out', {str(tmp_path / 'area')!r}, '--quiet']); "
        "print(code, sorted(m for m in sys.modules if m.split('.')[0] in ('sqlglot', 'pandas') or m.endswith('.spark')))"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout
    assert out.split() == ["0", "[]"], out
