"""Commands trace, impact and lineage (a thin layer over lineage.questions and lineage.export)."""

from __future__ import annotations

import argparse
import json
from pathlib import Path
from typing import TYPE_CHECKING, Any

from rich.console import Console
from rich.text import Text
from rich.tree import Tree

from cdcnorm.errors import EXIT_BREAKS, EXIT_INCOMPLETE, EXIT_OK, UsageError, counted, did_you_mean
from cdcnorm.lineage.diagnostics import rendered

if TYPE_CHECKING:
    from cdcnorm.lineage.graph import Project

# The lineage modules (sqlglot's optimizer, networkx, graphviz) load only when a lineage
# command runs, so that convert starts fast.


def _common(p: argparse.ArgumentParser) -> None:
    # defaults come from the project file (cdcnorm.toml, or [tool.cdcnorm] in pyproject.toml), then
    # from these: see project_settings
    p.add_argument("--models", help="folder of SQL model files (default: models/)")
    p.add_argument("--mappings", help="folder of mapping files (default: mappings/)")
    p.add_argument("--dialect", help="SQL dialect of the models, by sqlglot's names (default: duckdb)")
    p.add_argument(
        "--catalog",
        action="append",
        default=[],
        metavar="SOURCE",
        help="schemas of tables no mapping declares (repeatable): a .sql file of CREATE TABLE statements, "
        "a .yaml/.json schema file, a SQLite or DuckDB file, or a database URL",
    )
    p.add_argument("--json", action="store_true", help="print the answer as JSON")


def add_commands(sub: Any) -> None:
    t = sub.add_parser(
        "trace", help="the source columns behind an output column (or every column of a model)"
    )
    _common(t)
    t.add_argument("target", help="<model>.<column>, or a model name for all its columns")
    t.add_argument(
        "--paths",
        type=int,
        default=1,
        metavar="N",
        help="show up to N paths from each source, shortest first (default 1); the answer names the "
        "sources with more",
    )
    t.add_argument(
        "--influence",
        metavar="KINDS",
        help="show and follow only these influence kinds, comma-separated: "
        "join, filter, grouping, ordering, window, existence, unnest; none for value lineage alone "
        "(default: all)",
    )

    i = sub.add_parser("impact", help="what depends on a column, and what a schema edit would break (exit 8)")
    _common(i)
    i.add_argument("column", help="<mapping table>.<field>, <model>.<column> or a raw dump column")
    edit = i.add_mutually_exclusive_group()
    edit.add_argument("--drop", action="store_true", help="simulate dropping the column")
    edit.add_argument("--rename", metavar="NEW", help="simulate renaming the column")
    edit.add_argument(
        "--retype", metavar="TYPE", help="simulate changing the column's type, e.g. float, decimal(10,2)"
    )

    g = sub.add_parser(
        "lineage", help="export the lineage graph: .dot .svg .png .graphml .json .html (the explorer)"
    )
    _common(g)
    g.add_argument(
        "--out",
        default="lineage.svg",
        help="output file; its suffix picks the format: .dot .svg .png .graphml .json .html "
        "(default lineage.svg)",
    )
    g.add_argument(
        "--focus", metavar="COLUMN", help="draw only this column's neighbourhood, the column highlighted"
    )
    g.add_argument("--hops", type=int, default=2, help="edges from --focus to follow (default 2)")
    g.add_argument(
        "--direction",
        choices=["up", "down", "both"],
        default="both",
        help="follow --focus upstream, downstream or both (default both); never sideways",
    )
    g.add_argument(
        "--level", choices=["column", "table"], default="column", help="one node per column, or per table"
    )


SETTINGS = {"models": "models", "mappings": "mappings", "dialect": "duckdb", "catalog": []}


def project_settings(folder: Path) -> tuple[dict[str, Any], Path | None]:
    """The lineage settings of the project file in ``folder``: ``cdcnorm.toml``, or the
    ``[tool.cdcnorm]`` table of ``pyproject.toml``; paths in it are relative to its folder."""
    import tomllib

    for name, table in (("cdcnorm.toml", None), ("pyproject.toml", ("tool", "cdcnorm"))):
        path = folder / name
        if not path.is_file():
            continue
        try:
            data: Any = tomllib.loads(path.read_text(encoding="utf-8"))
        except tomllib.TOMLDecodeError as e:
            raise UsageError(f"{path}: not TOML: {e}") from None
        for key in table or ():
            data = data.get(key, {}) if isinstance(data, dict) else {}
        if not data:
            continue
        unknown = sorted(set(data) - set(SETTINGS))
        if unknown:
            raise UsageError(
                f"{path}: unknown setting {unknown[0]!r}{did_you_mean(unknown[0], SETTINGS)}",
                expected=", ".join(SETTINGS),
                found=unknown[0],
            )
        out = dict(data)
        for key in ("models", "mappings"):
            if key in out:
                out[key] = str(folder / out[key])
        catalogs = out.get("catalog", [])
        catalogs = [catalogs] if isinstance(catalogs, str) else list(catalogs)
        out["catalog"] = [c if "://" in c else str(folder / c) for c in catalogs]
        return out, path
    return {}, None


def _settle_settings(args: argparse.Namespace) -> None:
    """Command-line options over the project file over the built-in defaults."""
    found, _ = project_settings(Path.cwd())
    # mappings named on the command line or in the project file must be there; the default folder
    # may be missing (lineage needs no mappings)
    args.mappings_named = getattr(args, "mappings", None) is not None or "mappings" in found
    for key, default in SETTINGS.items():
        if key == "catalog":
            args.catalog = list(found.get("catalog", [])) + list(args.catalog or [])
        elif getattr(args, key, None) is None:
            setattr(args, key, found.get(key, default))


def _check_dialect(name: str) -> None:
    """A dialect sqlglot knows, or a usage error naming the closest (before: a traceback)."""
    import sqlglot
    from sqlglot.dialects.dialect import Dialects

    try:
        # sqlglot names its generic dialect "": an empty --dialect (an unset variable in a script)
        # would read the models as generic SQL without a word
        if not name.strip():
            raise ValueError(name)
        sqlglot.Dialect.get_or_raise(name)
    except ValueError:
        names = sorted(d.value for d in Dialects if d.value)
        raise UsageError(
            f"unknown SQL dialect {name!r}{did_you_mean(name, names)}",
            expected="one of sqlglot's dialects: " + ", ".join(names),
            found=name if name.strip() else f"{name!r} (an empty name)",
            hint="give it with --dialect, or as dialect in the project file",
        ) from None


def load_project(args: argparse.Namespace) -> tuple[Project, list[Any], Any]:
    from cdcnorm.lineage.graph import build_project
    from cdcnorm.lineage.models import load_models
    from cdcnorm.mapping import load_mappings

    _settle_settings(args)
    _check_dialect(args.dialect)
    mappings_dir = Path(args.mappings)
    # lineage needs no mappings: a missing default folder, or an empty folder, is none; but a folder
    # named that is not there is an error, and a mapping file named is read (before, both were
    # passed over: the answer went on without their schemas, every column "inferred")
    has_mappings = mappings_dir.is_dir() and any(mappings_dir.glob("*.y*ml"))
    named = args.mappings_named and not mappings_dir.is_dir()
    mappings = load_mappings(mappings_dir) if has_mappings or named else []
    models_dir = Path(args.models)
    if not models_dir.exists():
        raise UsageError(f"models folder {models_dir} does not exist", hint="pass --models")
    loaded = load_models(models_dir, args.dialect)
    from cdcnorm.lineage.catalogs import load_catalogs

    tables = load_catalogs(args.catalog, args.dialect) or None
    return build_project(None, mappings, args.dialect, loaded=loaded, tables=tables), mappings, loaded


def _trace_tree(answer: dict[str, Any]) -> Tree:
    tree = Tree(Text(answer["column"], style="bold"))

    def add_path(branch: Tree, p: dict[str, Any]) -> None:
        inferred = " (inferred: no schema declares it)" if p["source"] in answer["inferred"] else ""
        leaf = branch.add(Text.assemble(p["source"], (inferred, "dim")))
        for step in p["steps"]:
            leaf = leaf.add(
                Text.assemble(
                    f"{step['edge']} ({step['how']}) -> {step['to']}  ",
                    (f"{step['file']}:{step['line']}", "dim"),
                )
            )

    branch = tree.add(f"value lineage: {counted(len(answer['value']), 'source column')}")
    for p in answer["paths"]:
        if p["lineage"] == "value":
            add_path(branch, p)
    more = answer.get("more_paths", {})
    branch = tree.add(f"influence lineage: {counted(len(answer['influence']), 'source column')}")
    # grouped by kind: join keys that only connect tables apart from the filters that decide rows
    from cdcnorm.lineage.questions import KIND_NAMES

    for kind in KIND_NAMES:
        group = [p for p in answer["paths"] if p["lineage"] == "influence" and kind in p.get("kinds", [])]
        if group:
            sub = branch.add(f"{kind}: {len({p['source'] for p in group})}")
            for p in group:
                add_path(sub, p)
    for lineage in ("value", "influence"):
        if more.get(lineage):
            tree.add(
                f"other {lineage} paths from: {', '.join(more[lineage])} (--paths N shows up to N a source)"
            )
    if answer["raw"]:
        tree.add("dump columns: " + ", ".join(answer["raw"]))
    _print_unresolved(tree, answer)
    return tree


def run_command(args: argparse.Namespace, out: Console) -> int:
    from cdcnorm.lineage.export import export, neighbourhood, table_level
    from cdcnorm.lineage.questions import Edit, breaks, find_column, find_model, impact, trace_target

    project, mappings, loaded = load_project(args)
    if args.command == "trace":
        if args.influence is not None:
            from cdcnorm.lineage.questions import with_influence

            # before: an empty list (--influence '') was taken as "all kinds", the default
            kinds = [k.strip() for k in args.influence.split(",") if k.strip()]
            if not kinds:
                raise UsageError(
                    "--influence names no kind",
                    hint="write --influence none for value lineage alone, or name kinds: join,filter",
                )
            project = with_influence(project, [] if kinds == ["none"] else kinds)
        if args.paths < 1:
            raise UsageError(f"--paths must be at least 1, found {args.paths}")
        answers = trace_target(project, args.target, args.paths)
        if args.json:
            # a model's answers are a list (one per column), a column's one answer
            payload: Any = answers if find_model(project, args.target) is not None else answers[0]
            out.print(json.dumps(payload, indent=2), soft_wrap=True)
        else:
            for a in answers:
                out.print(_trace_tree(a), soft_wrap=False)
        # a CI gate must not pass on a partial graph: an answer with unresolved references says so
        return EXIT_OK if all(a["complete"] for a in answers) else EXIT_INCOMPLETE
    if args.command == "impact":
        edit = None
        if args.drop:
            edit = Edit("drop")
        elif args.rename is not None:
            if not args.rename.strip():
                raise UsageError(
                    "--rename needs the column's new name", expected="a name, e.g. --rename fare_gbp"
                )
            if args.rename == find_column(project, args.column)[2]:
                # before: an answer of no breaks and the column's row changes, exit 0, for no edit
                raise UsageError(
                    f"--rename {args.rename} is the column's own name: nothing would change",
                    expected="another name, e.g. --rename fare_gbp",
                    found=args.rename,
                )
            edit = Edit("rename", args.rename)
        elif args.retype is not None:
            edit = Edit("retype", _sql_type(args.retype, args.dialect))
        result = impact(project, args.column, edit, mappings=mappings, loaded=loaded)
        if args.json:
            out.print(json.dumps(result, indent=2), soft_wrap=True)
        else:
            _print_impact(result, out)
        if breaks(result):
            return EXIT_BREAKS
        return EXIT_OK if result["complete"] else EXIT_INCOMPLETE
    if args.command == "lineage":
        g = project.graph
        title = "column lineage"
        focus = None
        if args.hops < 0:
            raise UsageError("--hops must be 0 or more", found=str(args.hops))
        if args.focus:
            focus = find_column(project, args.focus)
            g = neighbourhood(g, focus, args.hops, args.direction)
            title = f"{args.focus}: {args.hops} hops {args.direction if args.direction != 'both' else 'up and down'}"
        if args.level == "table":
            g = table_level(g)
            focus = (focus[0], focus[1], "*") if focus else None
            title = title.replace("column lineage", "table lineage")
        gaps = [d.render() for d in project.diagnostics if d.unresolved]
        path = export(g, Path(args.out), title=title, focus=focus, gaps=gaps)
        summary = {
            "out": str(path),
            "nodes": g.number_of_nodes(),
            "edges": g.number_of_edges(),
            "models": len(project.models),
            "diagnostics": [d.as_dict() for d in project.diagnostics],
        }
        if args.json:
            out.print(json.dumps(summary, indent=2), soft_wrap=True)
        else:
            unit = "tables" if args.level == "table" else "columns"
            out.print(
                f"wrote {path}: {summary['nodes']} {unit}, {summary['edges']} edges, {summary['models']} models"
            )
            for d in project.diagnostics:
                out.print(f"{'unresolved' if d.unresolved else 'note'} {d.render()}", markup=False)
        # the graph drawn may lack what an unresolved reference would have added: said in the exit code
        return EXIT_INCOMPLETE if any(d.unresolved for d in project.diagnostics) else EXIT_OK
    raise UsageError(f"unknown command {args.command}")


def _print_impact(r: dict[str, Any], out: Console) -> None:
    edit = r["edit"]
    head = f"impact of {r['column']}" + (
        f" ({edit['kind']}{' ' + edit['value'] if edit['value'] else ''})" if edit else ""
    )
    tree = Tree(Text(head, style="bold"))
    for key, label in (
        ("value_dependents", "value dependents"),
        ("influence_dependents", "influence dependents"),
    ):
        b = tree.add(f"{label}: {len(r[key])}")
        for c in r[key]:
            b.add(c)
    if edit:
        b = tree.add(f"breaks: {len(r['broken_models']) + len(r['broken_mappings'])}")
        for m in r["broken_mappings"]:
            b.add(
                Text.assemble(
                    ("mapping", "red"),
                    f" {m['mapping']}: field {m['field']}: {m['reason']} (fix: {m['fix']})",
                )
            )
        for d in r["broken_models"]:
            b.add(
                Text.assemble(
                    ("model", "red"),
                    f" {d['model']} {d['file']}:{d['line']}: {d['reason']}: {d['reference']}",
                )
            )
        binding = r.get("binding") or {}
        if binding.get("checked"):
            b = tree.add(f"refused by the engine (binding check): {len(binding['broken'])}")
            for m in binding["broken"]:
                b.add(Text.assemble(("model", "red"), f" {m['model']}: {m['reason']}"))
            for u in binding["unavailable"]:
                b.add(Text.assemble(("not checked", "yellow"), f" {u['model']}: {u['reason']}"))
        b = tree.add(f"value changes: {len(r['value_changes'])}")
        for v in r["value_changes"]:
            b.add(f"{v['column']}: {v['how']}; {v['change']}")
        b = tree.add(f"row changes: {len(r['row_changes'])}")
        for v in r["row_changes"]:
            b.add(f"{v['column']}: the column is a {'/'.join(v['clauses']) or 'row'} key upstream")
    _print_unresolved(tree, r)
    out.print(tree, soft_wrap=False)


def _sql_type(text: str, dialect: str) -> str:
    """``--retype``'s type as given, once sqlglot reads it as a type of the dialect; a usage
    error naming the closest type otherwise (before: a traceback from the parser)."""
    from sqlglot import exp
    from sqlglot.errors import ParseError

    try:
        exp.DataType.build(text, dialect=dialect)
    except (ParseError, ValueError):
        word = text.split("(")[0].strip().lower()
        names = sorted({t.value.lower() for t in exp.DataType.Type} - {"unknown", "userdefined"})
        raise UsageError(
            f"--retype {text!r} is not a SQL type of the {dialect} dialect{did_you_mean(word, names)}",
            expected="a type such as float, decimal(10,2), varchar(20), bigint, timestamptz",
        ) from None
    return text


def _print_unresolved(tree: Tree, answer: dict[str, Any]) -> None:
    if answer.get("inferred"):
        tree.add(
            f"inferred: {', '.join(answer['inferred'])} (no schema declares these tables; give one with --catalog)"
        )
    if answer["complete"]:
        tree.add("complete: every reference on the way was resolved")
        return
    b = tree.add(
        Text.assemble(
            ("incomplete", "yellow"),
            f": {counted(len(answer['unresolved']), 'unresolved reference')} on the way",
        )
    )
    for d in answer["unresolved"]:
        b.add(Text(rendered(d), style="yellow"))
