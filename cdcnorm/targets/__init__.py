"""Target databases for ``apply``, one file each, looked up by the URL's scheme."""

from __future__ import annotations

import shlex
from pathlib import Path

import sqlalchemy as sa

from cdcnorm.errors import UsageError, did_you_mean
from cdcnorm.targets.base import Target
from cdcnorm.targets.duckdb import DuckDBTarget
from cdcnorm.targets.postgresql import PostgreSQLTarget
from cdcnorm.targets.sqlite import SQLiteTarget

TARGETS: dict[str, type[Target]] = {t.scheme: t for t in (SQLiteTarget, DuckDBTarget, PostgreSQLTarget)}


def target_for(url: str, wait: float) -> Target:
    try:
        parsed = sa.engine.make_url(url)
    except sa.exc.ArgumentError:
        raise UsageError(
            "--target is not a database URL",
            expected="e.g. sqlite:///warehouse.db, duckdb:///warehouse.duckdb, postgresql://user@host/db",
            found=url.split("@")[-1] if "@" in url else url,
        ) from None
    scheme = parsed.get_backend_name()
    if scheme not in TARGETS:
        raise UsageError(
            f"no target for databases of kind {scheme!r}{did_you_mean(scheme, TARGETS)}",
            expected=", ".join(TARGETS),
            found=scheme,
        )
    if scheme in ("sqlite", "duckdb") and parsed.database in (None, "", ":memory:"):
        # the driver would open a database in memory: everything applied, gone when apply ends
        suffix = "db" if scheme == "sqlite" else "duckdb"
        raise UsageError(
            f"a {scheme} target needs a file: {url} names a database in memory, lost when apply ends",
            expected=f"{scheme}:///path/to/warehouse.{suffix}",
            found=url,
        )
    if scheme in ("sqlite", "duckdb"):
        _check_file(Path(parsed.database or ""), url)
    return TARGETS[scheme](url, wait)


def _check_file(path: Path, url: str) -> None:
    """An embedded target's file is made by apply, its folder is not: say which is wrong before the
    driver's own words ('unable to open database file')."""
    if path.is_dir():
        raise UsageError(
            f"{url} names a folder, not a database file",
            expected=f"a file path, e.g. {path / 'warehouse.db'}",
            found=str(path),
        )
    folder = path.parent
    if not folder.is_dir():
        raise UsageError(
            f"{url}: the folder {folder} does not exist (apply makes the database file, not its folder)",
            expected="an existing folder",
            found=str(folder),
            hint=f"mkdir -p {shlex.quote(str(folder))}",
        )


__all__ = ["TARGETS", "Target", "target_for"]
