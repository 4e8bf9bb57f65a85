"""Column lineage: golden cases per SQL construct, TPC-H queries, diagnostics, questions, export."""

from __future__ import annotations

from pathlib import Path
from typing import Any

import pytest
import yaml

from cdcnorm.lineage.graph import Project, build_project
from cdcnorm.lineage.models import load_models
from cdcnorm.lineage.questions import trace

CASES = yaml.safe_load((Path(__file__).parent / "cases" / "lineage" / "constructs.yaml").read_text())


def project_from(
    tmp_path: Path, models: dict[str, str], schema: dict[str, dict[str, str]], dialect: str = "duckdb"
) -> Project:
    folder = tmp_path / "models"
    folder.mkdir(exist_ok=True)
    for name, sql in models.items():
        (folder / name).write_text(sql)
    return build_project(None, [], dialect, loaded=load_models(folder, dialect), tables=schema)


@pytest.mark.parametrize("case", CASES["cases"], ids=[c["name"] for c in CASES["cases"]])
def test_construct(case: dict[str, Any], tmp_path: Path) -> None:
    project = project_from(tmp_path, case["models"], CASES["schema"])
    assert [d.render() for d in project.diagnostics] == []
    for column, want in case["expect"].items():
        got = trace(project, column)
        assert got["value"] == sorted(want["value"]), (column, "value")
        assert got["influence"] == sorted(want["influence"]), (column, "influence")
